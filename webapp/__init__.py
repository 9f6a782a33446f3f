"""Rateferry: sample-rate conversion with a specified and verified filter."""

__version__ = "0.2.0"
