"""Evenhand: a governed decision-policy service."""

__version__ = "0.1.0"
