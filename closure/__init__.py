"""closure: subgrid-scale closure discovery from high-resolution simulation data."""
__version__ = "0.1.0"
