"""allolaw: a reproducible Bayesian pipeline for scaling laws in comparative biology."""

__version__ = "0.1.0"

__all__ = ["__version__"]
