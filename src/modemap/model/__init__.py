"""Stage 5, the hybrid model: its data classes, equilibria, switching guards and model file."""
