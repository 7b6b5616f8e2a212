"""Names comove used before and the words that replaced them.

Settings files written with an old name are refused with a one-line message that names the
new word (``rules[2].long: did you mean 'baseline'? 'long' is its old name``); nothing is
read under an old name silently, so a file always says what it means. Words already kept in
a store (a rule kind, an alert state) are read as the new words by ``storage`` itself.
"""

from __future__ import annotations

OLD_RULE_KINDS: dict[str, str] = {"basket": "group-average"}
"""Old rule kind -> its current word."""

OLD_RULE_KEYS: dict[str, dict[str, str]] = {
    "shift": {"long": "baseline", "test": "compare"},
    "jump": {"days": "over_days"},
    "stale": {"days": "after_days"},
    "level": {"confident": "require_band"},
}
"""Per rule kind: old key -> its current name."""

OLD_RULE_VALUES: dict[str, dict[str, str]] = {
    "compare": {"nested": "within", "adjacent": "previous"},
}
"""Per key: old value word -> its current word."""

OLD_SETTING_KEYS: dict[str, str] = {
    "movers_days": "largest_changes_days",
    "gauge_days": "group_average_days",
}
"""Old key of a settings section -> its current name."""


def old_name_hint(old: str, new: str) -> str:
    """The message part naming the new word for an old one."""
    return f"did you mean {new!r}? {old!r} is its old name"
