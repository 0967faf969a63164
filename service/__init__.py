"""Cuebank: content-addressable lookup over partial keys."""

__version__ = "0.1.0"
