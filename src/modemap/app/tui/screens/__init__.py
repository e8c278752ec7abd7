"""Dashboard panels (full-size views) and modal screens."""
