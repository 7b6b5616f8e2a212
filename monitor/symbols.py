"""The one rule for an instrument symbol, shared by the settings and the closes files.

A symbol is what a closes file names and what the store keys on (a 64-character column), so
the settings and ingest must agree on it: 1 to 64 characters, none of them blank, a comma,
a semicolon (both separate fields in the files and lists in the settings) or a
control character.
"""

from __future__ import annotations

import re

SYMBOL_MAX_LENGTH = 64
SYMBOL_PATTERN = re.compile(r"^[^\s,;\x00-\x1f\x7f]{1," + str(SYMBOL_MAX_LENGTH) + r"}\Z")
SYMBOL_RULE = (f"1 to {SYMBOL_MAX_LENGTH} characters without spaces, commas, ';' or "
               "control characters")


def symbol_problem(value: object) -> str | None:
    """None for a valid symbol, else the rule it breaks (for a message)."""
    if isinstance(value, str) and SYMBOL_PATTERN.match(value):
        return None
    return SYMBOL_RULE
