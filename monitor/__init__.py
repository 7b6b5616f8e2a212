"""comove: a correlation monitor for a market-risk desk."""

from __future__ import annotations

__version__ = "0.1.0"
