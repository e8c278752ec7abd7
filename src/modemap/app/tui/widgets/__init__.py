"""Dashboard building blocks: braille plots, regime strips, text tables, data adapters."""
