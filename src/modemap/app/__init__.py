"""Thin layers over the library: the command line, the benchmark and the terminal dashboard.

The library never imports this package.
"""
