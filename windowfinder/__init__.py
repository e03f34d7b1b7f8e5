"""windowfinder: process windows from few expensive runs."""

__version__ = "0.1.0"

