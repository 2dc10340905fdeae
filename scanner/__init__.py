"""cutscan: screen administrative tables for regression-discontinuity natural experiments."""
__version__ = "0.1.0"
