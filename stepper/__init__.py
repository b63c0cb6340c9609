"""Stepper: see every weight's slope, check it, and step gradient descent by hand."""

__version__ = "0.1.0"
