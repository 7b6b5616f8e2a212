"""Rule kinds by config word, building rules from ``[[rules]]`` tables, what they read.

:func:`build_rules` is the only entry point the config loader needs; the pipeline then asks
:func:`measures_needed`, :func:`lags_needed` and :func:`pairs_needed` what to compute, and
the settings documentation is generated from :func:`rule_parameters`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from monitor.engine.layout import sorted_unique
from monitor.errors import ConfigError
from monitor.renamed import OLD_RULE_KINDS, old_name_hint
from monitor.rules.base import SEVERITIES, Rule
from monitor.rules.cusum import CusumRule
from monitor.rules.group_average import GroupAverageRule
from monitor.rules.hedge import HedgeRule
from monitor.rules.jump import JumpRule
from monitor.rules.level import LevelRule
from monitor.rules.params import Param, TableReader, suggestion
from monitor.rules.shift import ShiftRule
from monitor.rules.sign import SignRule
from monitor.rules.stale import StaleRule
from monitor.rules.targets import IntArray, Universe

RULE_KINDS: dict[str, type[Rule]] = {
    rule.kind: rule for rule in (LevelRule, ShiftRule, JumpRule, SignRule, GroupAverageRule,
                                  StaleRule, CusumRule, HedgeRule)
}
"""Config word -> rule class."""


def rule_parameters() -> dict[str, list[Param]]:
    """Every accepted key of every rule kind, in documentation order."""
    return {kind: list(rule.parameters()) for kind, rule in RULE_KINDS.items()}


def _rule_class(table: Mapping[str, object], index: int) -> type[Rule]:
    name = table.get("name")
    label = f"rules[{index}] ({name})" if isinstance(name, str) and name else f"rules[{index}]"
    kind = table.get("kind")
    known = ", ".join(sorted(RULE_KINDS))
    if kind is None:
        raise ConfigError(f"{label}.kind: missing required key (one of {known})")
    if isinstance(kind, str) and kind in OLD_RULE_KINDS:
        raise ConfigError(f"{label}.kind: {old_name_hint(kind, OLD_RULE_KINDS[kind])}")
    if not isinstance(kind, str) or kind not in RULE_KINDS:
        hint = suggestion(kind, RULE_KINDS) if isinstance(kind, str) else ""
        raise ConfigError(f"{label}.kind: unknown kind {kind!r}{hint}; known kinds: {known}")
    return RULE_KINDS[kind]


def build_rules(
    tables: Sequence[object],
    *,
    symbols: Sequence[str],
    groups: Mapping[str, Sequence[str]],
    default_measure: str | None = None,
    max_window: int | None = None,
) -> list[Rule]:
    """Build and check every rule of the configuration.

    Parameters
    ----------
    tables : sequence of dict
        The ``[[rules]]`` tables, TOML-parsed, in file order.
    symbols : sequence of str
        The desk's instruments; column ``k`` of every array is ``symbols[k]``.
    groups : mapping of str to sequence of str
        Named groups of instruments.
    default_measure : str, optional
        Measure spec used by rules that do not set ``measure``.
    max_window : int, optional
        Longest window or half-life a rule's measures may have (``correlation.max_window``).

    Returns
    -------
    list of Rule
        In file order.

    Raises
    ------
    ConfigError
        The first problem found, as one line naming the rule and key.
    """
    key = _memo_key(tables, symbols, groups, default_measure, max_window)
    if key in _BUILT:
        return list(_BUILT[key])
    universe = Universe.build(symbols, groups)
    rules: list[Rule] = []
    seen: dict[str, int] = {}
    for index, table in enumerate(tables):
        rule = _build_one(table, index, universe, default_measure, seen, max_window)
        assert rule is not None
        rules.append(rule)
    _remember(key, rules)
    return rules


_BUILT: dict[tuple[object, ...], tuple[Rule, ...]] = {}
"""Rules built lately, by their inputs: loading the settings checks the rules by building
them, and the command then asks for the same rules again (at 3,000 instruments a rule over
every pair resolves 4.5 million pairs; once is enough). Rules are immutable."""


def _memo_key(tables: Sequence[object], symbols: Sequence[str],
              groups: Mapping[str, Sequence[str]], default_measure: str | None,
              max_window: int | None) -> tuple[object, ...]:
    return (repr(list(tables)), tuple(symbols),
            repr(sorted((name, list(members)) for name, members in groups.items())),
            default_measure, max_window)


def _remember(key: tuple[object, ...], rules: Sequence[Rule]) -> None:
    while len(_BUILT) >= 4:
        del _BUILT[next(iter(_BUILT))]
    _BUILT[key] = tuple(rules)


def _build_one(table: object, index: int, universe: Universe | None,
               default_measure: str | None, seen: dict[str, int],
               max_window: int | None = None) -> Rule | None:
    """One rule from its table; with no universe only its kind, keys and name are checked."""
    if not isinstance(table, Mapping):
        raise ConfigError(f"rules[{index}]: expected a table, got {type(table).__name__}")
    rule_class = _rule_class(table, index)
    reader = TableReader(table, index, rule_class.parameters(), rule_class.kind)
    reader.check_keys()
    if universe is None:
        return None
    rule = rule_class.from_table(reader, universe, default_measure)
    if rule.name in seen:
        raise reader.error(
            "name", f"duplicate rule name {rule.name!r} (also rules[{seen[rule.name]}])"
        )
    seen[rule.name] = index
    if max_window is not None:
        from monitor.engine.spec import parse_measure, window_problem

        for text in rule.measures():
            problem = window_problem(parse_measure(text), max_window)
            if problem:
                raise reader.error("measure", problem)
    return rule


def rule_problems(
    tables: Sequence[object],
    *,
    symbols: Sequence[str] | None,
    groups: Mapping[str, Sequence[str]],
    default_measure: str | None = None,
    max_window: int | None = None,
) -> list[str]:
    """Every problem of the ``[[rules]]`` tables, one line each (at most one per rule).

    With ``symbols`` None (no instruments listed: the store decides them at run time) only
    each rule's kind and keys are checked; the targets are checked when the rules run.
    """
    universe = None
    if symbols is not None:
        try:
            universe = Universe.build(symbols, groups)
        except ConfigError as exc:
            return [str(exc)]
    problems: list[str] = []
    seen: dict[str, int] = {}
    rules: list[Rule] = []
    for index, table in enumerate(tables):
        try:
            rule = _build_one(table, index, universe, default_measure, seen, max_window)
        except ConfigError as exc:
            problems.append(str(exc))
            continue
        if rule is not None:
            rules.append(rule)
    if symbols is not None and not problems:
        _remember(_memo_key(tables, symbols, groups, default_measure, max_window), rules)
    return problems


def measures_needed(rules: Sequence[Rule]) -> list[str]:
    """Distinct measure texts the rules read, in first-use order."""
    return list(dict.fromkeys(text for rule in rules for text in rule.measures()))


def lags_needed(rules: Sequence[Rule]) -> list[tuple[str, int]]:
    """Distinct ``(measure text, lag)`` couples the rules read from earlier days."""
    return list(dict.fromkeys(lag for rule in rules for lag in rule.lags()))


def pairs_needed(rules: Sequence[Rule], n_symbols: int) -> IntArray:
    """Union (P_all, 2) of the pairs the rules read, ``i < j``, sorted by (i, j)."""
    blocks = [rule.pairs_needed() for rule in rules]
    stacked = np.concatenate(blocks) if blocks else np.empty((0, 2), dtype=np.int64)
    codes = sorted_unique(stacked[:, 0] * n_symbols + stacked[:, 1])
    return np.column_stack([codes // n_symbols, codes % n_symbols]).astype(np.int64)


__all__ = [
    "RULE_KINDS",
    "SEVERITIES",
    "build_rules",
    "lags_needed",
    "measures_needed",
    "pairs_needed",
    "rule_parameters",
    "rule_problems",
]
