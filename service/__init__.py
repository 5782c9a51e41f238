"""hotbasis: re-optimization of linear programs from a stored simplex basis."""

__version__ = "0.1.0"
