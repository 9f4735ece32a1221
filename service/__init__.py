"""Tikhon: tune, version and serve regularized regression models."""

__version__ = "0.1.0"
