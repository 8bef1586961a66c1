"""Stagewise: design review of analog signal chains, from sensor to converter."""

__version__ = "0.1.0"
