"""comove: a correlation monitor for a market-risk desk."""

from __future__ import annotations

__version__ = "0.1.0"
"""The one place the version is written (pyproject.toml reads it from here)."""
