"""Rules: configuration checking, target resolution and the daily conditions of each kind.

The desk here is fictional: Kelvara Industrial (KLV), Orma Utilities (ORMA), Vesk Freight
(VESK), the TEZ10 and LUMA5 rate futures and the Prax credit index (PRAX).
"""

from __future__ import annotations

import datetime
import math
from collections.abc import Mapping

import numpy as np
import pytest

from monitor.alerts.book import AlertBook, AlertEvent
from monitor.errors import ConfigError, SpecError
from monitor.rules import (
    RULE_KINDS,
    DayInputs,
    MeasureDay,
    MeasureLike,
    PairLayout,
    Rule,
    build_rules,
    fisher_difference,
    lags_needed,
    measures_needed,
    pairs_needed,
    rule_parameters,
    two_sided_p,
)
from monitor.rules.params import _check_measure

SYMBOLS = ["KLV", "ORMA", "VESK", "TEZ10", "LUMA5", "PRAX"]
GROUPS = {"equities": ["KLV", "ORMA", "VESK"], "rates": ["TEZ10", "LUMA5"], "credit": ["PRAX"]}
START = datetime.date(2024, 3, 1)


def build(*tables: dict[str, object], default_measure: str | None = None) -> list[Rule]:
    return build_rules(
        list(tables), symbols=SYMBOLS, groups=GROUPS, default_measure=default_measure
    )


def one(**table: object) -> Rule:
    base: dict[str, object] = {"name": "t", "measure": "rolling:63"}
    base.update(table)
    return build(base)[0]


def error_of(*tables: dict[str, object], default_measure: str | None = None) -> str:
    with pytest.raises(ConfigError) as info:
        build(*tables, default_measure=default_measure)
    return str(info.value)


def measure_day(
    value: object, *, low: object = None, high: object = None, n: object = 63.0
) -> MeasureDay:
    values = np.asarray(value, dtype=np.float64)
    size = values.shape
    return MeasureDay(
        value=values,
        n=np.broadcast_to(np.asarray(n, dtype=np.float64), size).copy(),
        low=values - 0.1 if low is None else np.asarray(low, dtype=np.float64),
        high=values + 0.1 if high is None else np.asarray(high, dtype=np.float64),
        stale=np.zeros(size, dtype=bool),
    )


def day_for(
    rule: Rule,
    measures: Mapping[str, MeasureLike],
    *,
    offset: int = 0,
    lagged: dict[tuple[str, int], MeasureDay] | None = None,
    **extra: object,
) -> DayInputs:
    """Per-pair arrays aligned to exactly the pairs the rule reads."""
    layout = PairLayout(rule.pairs_needed(), len(SYMBOLS))
    return DayInputs(
        date=START + datetime.timedelta(days=offset),
        measures=measures,
        layout=layout,
        lagged=lagged or {},
        **extra,  # type: ignore[arg-type]
    )


def run(rule: Rule, days: list[DayInputs]) -> list[AlertEvent]:
    book = AlertBook()
    events: list[AlertEvent] = []
    for day in days:
        events += book.step(rule, rule.evaluate(day), day.date)
    return events


def summary(events: list[AlertEvent]) -> list[tuple[str, str, int]]:
    return [(e.event, e.target, (e.date - START).days) for e in events]


# --- targets ---------------------------------------------------------------------------


def test_pairs_are_canonical_sorted_and_deduplicated() -> None:
    rule = one(kind="level", above=0.7, pairs=["ORMA/KLV", "KLV/ORMA", "TEZ10/KLV"])
    assert rule.targets.labels == ("KLV/ORMA", "KLV/TEZ10")
    np.testing.assert_array_equal(rule.pairs_needed(), [[0, 1], [0, 3]])


def test_group_targets_every_pair_within_the_group() -> None:
    rule = one(kind="level", above=0.7, group="equities")
    assert rule.targets.labels == ("KLV/ORMA", "KLV/VESK", "ORMA/VESK")


def test_between_targets_only_pairs_across_the_two_groups() -> None:
    rule = one(kind="level", above=0.7, between=["equities", "rates"])
    assert set(rule.targets.labels) == {
        f"{a}/{b}" for a in ("KLV", "ORMA", "VESK") for b in ("TEZ10", "LUMA5")
    }
    assert len(rule.targets) == 6


def test_all_targets_every_pair_in_upper_triangle_order() -> None:
    rule = one(kind="level", above=0.7, all=True)
    first, second = np.triu_indices(len(SYMBOLS), k=1)
    np.testing.assert_array_equal(rule.pairs_needed(), np.column_stack([first, second]))


def test_pairs_group_and_between_combine_as_a_union() -> None:
    rule = one(kind="level", above=0.7, pairs=["PRAX/KLV", "KLV/ORMA"], group="rates")
    assert rule.targets.labels == ("KLV/ORMA", "KLV/PRAX", "TEZ10/LUMA5")


def test_unknown_symbol_in_a_pair_is_named_with_a_suggestion() -> None:
    message = error_of({"name": "t", "kind": "level", "measure": "rolling:63", "above": 0.7,
                        "pairs": ["KLW/ORMA"]})
    assert message == "rules[0] (t).pairs: unknown symbol 'KLW' in 'KLW/ORMA' (did you mean 'KLV'?)"


def test_unknown_group_is_named_with_a_suggestion() -> None:
    message = error_of({"name": "t", "kind": "level", "measure": "rolling:63", "above": 0.7,
                        "group": "equites"})
    assert message == "rules[0] (t).group: unknown group 'equites' (did you mean 'equities'?)"


def test_unknown_group_in_between_names_the_key() -> None:
    message = error_of({"name": "t", "kind": "level", "measure": "rolling:63", "above": 0.7,
                        "between": ["equities", "fx"]})
    assert message.startswith("rules[0] (t).between: unknown group 'fx'")


def test_group_of_one_instrument_resolves_to_no_pairs() -> None:
    message = error_of({"name": "t", "kind": "level", "measure": "rolling:63", "above": 0.7,
                        "group": "credit"})
    assert message == "rules[0] (t).group: resolves to no pairs"


def test_rule_without_targets_is_refused() -> None:
    message = error_of({"name": "t", "kind": "level", "measure": "rolling:63", "above": 0.7})
    assert message.startswith("rules[0] (t).targets: no targets")


def test_all_cannot_be_combined_with_explicit_pairs() -> None:
    message = error_of({"name": "t", "kind": "level", "measure": "rolling:63", "above": 0.7,
                        "all": True, "pairs": ["KLV/ORMA"]})
    assert message == "rules[0] (t).all: all = true cannot be combined with pairs"


@pytest.mark.parametrize(
    ("pair", "problem"),
    [
        ("KLV-ORMA", "is not a pair written as 'A/B'"),
        ("KLV/KLV", "pairs an instrument with itself"),
    ],
)
def test_malformed_pairs_are_refused(pair: str, problem: str) -> None:
    message = error_of({"name": "t", "kind": "level", "measure": "rolling:63", "above": 0.7,
                        "pairs": [pair]})
    assert message == f"rules[0] (t).pairs: {pair!r} {problem}"


def test_group_naming_an_unknown_symbol_is_refused() -> None:
    with pytest.raises(ConfigError, match=r"^groups\.rates: unknown symbol 'TEZ20'"):
        build_rules([], symbols=SYMBOLS, groups={"rates": ["TEZ10", "TEZ20"]})


def test_target_mask_marks_labels_and_ignores_unknown_ones() -> None:
    rule = one(kind="level", above=0.7, group="equities")
    mask = rule.targets.mask(["ORMA/VESK", "KLV/PRAX"])
    np.testing.assert_array_equal(mask, [False, False, True])


# --- configuration errors --------------------------------------------------------------


def test_unknown_kind_suggests_the_nearest() -> None:
    message = error_of({"name": "t", "kind": "levle"})
    assert message.startswith("rules[0] (t).kind: unknown kind 'levle' (did you mean 'level'?)")


def test_missing_kind_lists_the_known_kinds() -> None:
    message = error_of({"name": "t"})
    assert message == (
        "rules[0] (t).kind: missing required key "
        "(one of cusum, group-average, hedge, jump, level, shift, sign, stale)"
    )


@pytest.mark.parametrize(
    ("table", "expected"),
    [
        ({"kind": "basket", "above": 0.6, "group": "equities"},
         "rules[2] (t).kind: did you mean 'group-average'? 'basket' is its old name"),
        ({"kind": "shift", "measure": "rolling:21", "long": "rolling:126", "all": True},
         "rules[2] (t).long: did you mean 'baseline'? 'long' is its old name"),
        ({"kind": "shift", "measure": "rolling:63", "test": "adjacent", "all": True},
         "rules[2] (t).test: did you mean 'compare'? 'test' is its old name"),
        ({"kind": "shift", "measure": "rolling:63", "compare": "adjacent", "all": True},
         "rules[2] (t).compare: did you mean 'previous'? 'adjacent' is its old name"),
        ({"kind": "shift", "measure": "rolling:21", "baseline": "rolling:126",
          "compare": "nested", "all": True},
         "rules[2] (t).compare: did you mean 'within'? 'nested' is its old name"),
        ({"kind": "jump", "delta": 0.3, "days": 5, "all": True},
         "rules[2] (t).days: did you mean 'over_days'? 'days' is its old name"),
        ({"kind": "stale", "days": 3, "all": True},
         "rules[2] (t).days: did you mean 'after_days'? 'days' is its old name"),
        ({"kind": "level", "above": 0.7, "confident": True, "all": True},
         "rules[2] (t).confident: did you mean 'require_band'? 'confident' is its old name"),
    ],
)
def test_an_old_name_is_refused_with_its_new_name(table: dict[str, object], expected: str
                                                 ) -> None:
    """A settings file written with a name comove used before gets the new word, never a
    silent reading nor a bare 'unknown key'."""
    quiet = {"name": "q", "kind": "level", "above": 0.7, "measure": "rolling:63", "all": True}
    with pytest.raises(ConfigError) as caught:
        build_rules([quiet, {**quiet, "name": "r"}, {"name": "t", **table}],
                    symbols=SYMBOLS, groups=GROUPS)
    assert str(caught.value) == expected


def test_the_new_names_are_read() -> None:
    within, previous, jump, stale, level = build_rules([
        {"name": "a", "kind": "shift", "measure": "rolling:21", "baseline": "rolling:126",
         "compare": "within", "variance": "fisher", "all": True},
        {"name": "b", "kind": "shift", "measure": "rolling:63", "compare": "previous",
         "variance": "fisher", "all": True},
        {"name": "c", "kind": "jump", "delta": 0.3, "over_days": 7, "measure": "rolling:63",
         "all": True},
        {"name": "d", "kind": "stale", "after_days": 4, "all": True},
        {"name": "e", "kind": "level", "above": 0.7, "require_band": True,
         "measure": "rolling:63", "all": True},
    ], symbols=SYMBOLS, groups=GROUPS)
    assert within.lags() == [] and within.measures() == ["rolling:21", "rolling:126"]
    assert previous.lags() == [("rolling:63", 63)]
    assert jump.lags() == [("rolling:63", 7)]
    assert stale.after_days == 4
    assert level.require_band and level.method_note() is not None


def test_two_measures_are_joined_with_vs_not_a_comma() -> None:
    """A comma separates a measure's own options (rolling:21,min=17), so it cannot also
    separate two measures."""
    rule = one(kind="shift", measure="rolling:21,min=17", baseline="rolling:126,min=100",
               variance="fisher", pairs=["KLV/ORMA"])
    assert rule.measure_label() == "rolling:21,min=17 vs rolling:126,min=100"
    assert one(kind="level", above=0.7, pairs=["KLV/ORMA"]).measure_label() == "rolling:63"


def test_unknown_key_suggests_the_nearest() -> None:
    message = error_of({"name": "t", "kind": "level", "abov": 0.7, "all": True})
    assert message == "rules[0] (t).abov: unknown key for kind 'level' (did you mean 'above'?)"


def test_key_of_another_kind_is_unknown_here() -> None:
    message = error_of({"name": "t", "kind": "level", "above": 0.7, "all": True, "delta": 0.2})
    assert message.startswith("rules[0] (t).delta: unknown key for kind 'level'")


def test_clear_on_the_wrong_side_of_above_names_rule_and_key() -> None:
    tables = [
        {"name": "calm", "kind": "level", "measure": "rolling:63", "above": 0.5, "all": True},
        {"name": "drift", "kind": "sign", "measure": "rolling:63", "expected": "positive",
         "all": True},
        {"name": "hedge-break", "kind": "level", "measure": "rolling:63", "above": 0.7,
         "clear": 0.75, "all": True},
    ]
    assert error_of(*tables) == (
        "rules[2] (hedge-break).clear: 0.75 is on the wrong side of above = 0.7 (must be below it)"
    )


def test_clear_on_the_wrong_side_of_below_names_rule_and_key() -> None:
    message = error_of({"name": "t", "kind": "level", "measure": "rolling:63", "below": -0.2,
                        "clear": -0.3, "all": True})
    assert message == (
        "rules[0] (t).clear: -0.3 is on the wrong side of below = -0.2 (must be above it)"
    )


def test_level_needs_exactly_one_of_above_and_below() -> None:
    neither = error_of({"name": "t", "kind": "level", "measure": "rolling:63", "all": True})
    both = error_of({"name": "t", "kind": "level", "measure": "rolling:63", "above": 0.7,
                     "below": -0.7, "all": True})
    assert neither == (
        "rules[0] (t).above: missing required key (set exactly one of above and below)"
    )
    assert both == "rules[0] (t).below: set exactly one of above and below, not both"


def test_window_shorter_than_three_is_refused_with_rule_and_key() -> None:
    with pytest.raises(SpecError) as info:
        build({"name": "t", "kind": "level", "measure": "rolling:2", "above": 0.7, "all": True})
    assert str(info.value).startswith("rules[0] (t).measure: ")


def test_a_window_shorter_than_3_is_refused_with_rule_and_key() -> None:
    with pytest.raises(SpecError) as info:
        build({"name": "t", "kind": "level", "measure": "rolling:2", "above": 0.5,
               "all": True})
    assert str(info.value).startswith("rules[0] (t).measure: ")
    assert "window must be >= 3" in str(info.value)


@pytest.mark.parametrize("spec", ["rollin:63", "ewma:hl=21,lambda=0.9", "ewma:lambda=1.2", "rank"])
def test_unknown_measure_spec_is_refused_with_rule_and_key(spec: str) -> None:
    with pytest.raises(SpecError) as info:
        build({"name": "t", "kind": "jump", "measure": spec, "delta": 0.2, "all": True})
    assert str(info.value).startswith("rules[0] (t).measure: ")


def test_measure_check_reads_windows_and_decays() -> None:
    assert _check_measure("rank:63").window == 63
    # lambda from a half-life: 0.5 ** (1 / hl), the definition of a half-life.
    assert _check_measure("ewma:hl=21").decay == pytest.approx(0.5 ** (1 / 21))
    assert _check_measure("ewma:lambda=0.94,mean=zero").decay == 0.94


def test_rule_without_measure_uses_the_default_measure() -> None:
    (rule,) = build({"name": "t", "kind": "level", "above": 0.7, "all": True},
                    default_measure="ewma:hl=21")
    assert rule.measures() == ["ewma:hl=21"]


def test_rule_without_measure_and_without_default_is_refused() -> None:
    message = error_of({"name": "t", "kind": "level", "above": 0.7, "all": True})
    assert message == (
        "rules[0] (t).measure: missing required key (no default measure is configured)"
    )


def test_bad_default_measure_is_reported_on_the_rule_using_it() -> None:
    with pytest.raises(SpecError) as info:
        build({"name": "t", "kind": "level", "above": 0.7, "all": True},
              default_measure="rollng:63")
    assert str(info.value).startswith("rules[0] (t).measure (default): ")


@pytest.mark.parametrize(
    ("key", "value", "expected"),
    [
        ("hold", "3", "rules[0] (t).hold: expected an integer, got '3' (str)"),
        ("hold", True, "rules[0] (t).hold: expected an integer, got True (bool)"),
        ("hold", 0, "rules[0] (t).hold: 0 is below the minimum 1"),
        ("above", "high", "rules[0] (t).above: expected a number, got 'high' (str)"),
        ("above", 1.5, "rules[0] (t).above: 1.5 is above the maximum 1"),
        ("require_band", "yes",
         "rules[0] (t).require_band: expected true or false, got 'yes' (str)"),
        ("pairs", "KLV/ORMA",
         "rules[0] (t).pairs: expected a list of strings, got 'KLV/ORMA' (str)"),
        ("severity", "warn",
         "rules[0] (t).severity: 'warn' is not one of info, warning, critical "
         "(did you mean 'warning'?)"),
        ("remind_every", -1, "rules[0] (t).remind_every: -1 is below the minimum 0"),
    ],
)
def test_wrong_types_and_values_name_rule_key_and_value(
    key: str, value: object, expected: str
) -> None:
    table: dict[str, object] = {"name": "t", "kind": "level", "measure": "rolling:63",
                                "above": 0.7, "group": "equities"}
    table[key] = value
    assert error_of(table) == expected


def test_duplicate_rule_names_are_refused() -> None:
    table = {"name": "t", "kind": "level", "measure": "rolling:63", "above": 0.7, "all": True}
    assert error_of(table, dict(table)) == (
        "rules[1] (t).name: duplicate rule name 't' (also rules[0])"
    )


def test_missing_and_malformed_names_are_refused() -> None:
    assert error_of({"kind": "level", "above": 0.7, "all": True}) == (
        "rules[0].name: missing required key"
    )
    assert error_of({"name": "hedge break", "kind": "level", "above": 0.7, "all": True}) == (
        "rules[0] (hedge break).name: 'hedge break' is not a valid rule name "
        "(letters, digits, '-', '_', '.')"
    )


def test_rules_entry_that_is_not_a_table_is_refused() -> None:
    with pytest.raises(ConfigError, match=r"^rules\[0\]: expected a table, got str$"):
        build_rules(["level"], symbols=SYMBOLS, groups=GROUPS)


@pytest.mark.parametrize(
    ("table", "expected"),
    [
        ({"kind": "jump", "all": True}, "rules[0] (t).delta: missing required key"),
        ({"kind": "sign", "all": True}, "rules[0] (t).expected: missing required key"),
        ({"kind": "sign", "expected": "up", "all": True},
         "rules[0] (t).expected: 'up' is not one of positive, negative"),
        ({"kind": "shift", "all": True},
         "rules[0] (t).baseline: missing required key (compare = 'within' needs it)"),
        ({"kind": "shift", "baseline": "rolling:21", "all": True},
         "rules[0] (t).baseline: 'rolling:21' must be a longer measure of the same kind as "
         "measure = 'rolling:63'"),
        ({"kind": "shift", "baseline": "ewma:hl=126", "all": True},
         "rules[0] (t).baseline: 'ewma:hl=126' must be a longer measure of the same kind as "
         "measure = 'rolling:63'"),
        ({"kind": "shift", "compare": "previous", "baseline": "rolling:126", "all": True},
         "rules[0] (t).baseline: only used with compare = 'within'"),
        ({"kind": "shift", "compare": "previous", "measure": "ewma:hl=21", "all": True},
         "rules[0] (t).measure: 'ewma:hl=21': compare = 'previous' needs a window measure "
         "(rolling:<days> or rank:<days>)"),
        ({"kind": "shift", "baseline": "rolling:126", "z": 3.0, "clear_z": 3.5, "all": True},
         "rules[0] (t).clear_z: 3.5 must be below z = 3.0"),
        ({"kind": "group-average", "above": 0.6},
         "rules[0] (t).group: no targets: set group or all = true"),
        ({"kind": "group-average", "above": 0.6, "group": "credit"},
         "rules[0] (t).group: group 'credit' has fewer than two instruments"),
        ({"kind": "stale", "symbols": ["KLV", "ORMX"]},
         "rules[0] (t).symbols: unknown symbol 'ORMX' (did you mean 'ORMA'?)"),
        ({"kind": "stale", "measure": "rolling:63", "all": True},
         "rules[0] (t).measure: unknown key for kind 'stale'"),
    ],
)
def test_each_kind_reports_its_own_bad_settings(table: dict[str, object], expected: str) -> None:
    full: dict[str, object] = {"name": "t"}
    if table["kind"] != "stale":
        full["measure"] = "rolling:63"
    full.update(table)
    assert error_of(full).startswith(expected)


def test_every_kind_documents_each_parameter() -> None:
    documented = rule_parameters()
    assert set(documented) == set(RULE_KINDS) == {
        "level", "shift", "jump", "sign", "group-average", "stale", "cusum", "hedge"
    }
    for kind, params in documented.items():
        names = [param.name for param in params]
        assert len(names) == len(set(names)), kind
        assert {"name", "kind", "severity", "remind_every", "hold"} <= set(names)
        for param in params:
            assert param.help.endswith("."), (kind, param.name)
            assert param.type_label


def test_documented_defaults_are_the_defaults_applied() -> None:
    (rule,) = build({"name": "t", "kind": "shift", "measure": "rolling:21",
                     "baseline": "rolling:126", "all": True})
    defaults = {param.name: param.default for param in rule_parameters()["shift"]}
    assert rule.severity == defaults["severity"] == "warning"
    assert rule.remind_every == defaults["remind_every"]
    assert rule.hold == defaults["hold"] == 1
    # Default threshold: calibrated to false_alarms = 0.01 per pair per year (no fixed z).
    assert defaults["z"] is None and defaults["false_alarms"] == 0.01
    assert defaults["variance"] == "robust" and defaults["fdr"] == "none"
    assert rule.z_level == pytest.approx(4.2903, abs=1e-3)  # type: ignore[attr-defined]
    # 4.2903: the Gaussian upcrossing level 3.9425 raised for the statistic's excess
    # kurtosis 0.2 (monitor.rules.calibration, tests/rules/test_calibration.py).
    # documented as the opening threshold - 1
    assert rule.clear_z == pytest.approx(rule.z_level - 1.0)  # type: ignore[attr-defined]


# --- what the pipeline must compute ------------------------------------------------------


def test_rules_declare_measures_lags_and_pairs_they_read() -> None:
    rules = build(
        {"name": "a", "kind": "level", "measure": "rolling:63", "above": 0.7,
         "pairs": ["KLV/ORMA"]},
        {"name": "b", "kind": "shift", "measure": "rolling:21", "compare": "previous",
         "variance": "fisher", "group": "rates"},
        {"name": "c", "kind": "jump", "measure": "rolling:63", "delta": 0.3, "over_days": 5,
         "pairs": ["KLV/ORMA"]},
        {"name": "d", "kind": "group-average", "measure": "ewma:hl=21", "above": 0.6,
         "group": "equities"},
        {"name": "e", "kind": "stale", "all": True},
    )
    assert measures_needed(rules) == ["rolling:63", "rolling:21", "ewma:hl=21"]
    assert lags_needed(rules) == [("rolling:21", 21), ("rolling:63", 5)]
    np.testing.assert_array_equal(
        pairs_needed(rules, len(SYMBOLS)), [[0, 1], [0, 2], [1, 2], [3, 4]]
    )


def test_full_matrix_and_per_pair_inputs_give_the_same_condition() -> None:
    rule = one(kind="level", above=0.5, between=["equities", "rates"])
    rng = np.random.default_rng(7)
    n = len(SYMBOLS)
    matrix = rng.uniform(-1, 1, size=(n, n))
    pairs = rule.pairs_needed()
    # The engine's pair list can be in any order; the layout finds each rule pair in it.
    layout_pairs = np.column_stack(np.triu_indices(n, k=1))[::-1]
    per_pair = matrix[layout_pairs[:, 0], layout_pairs[:, 1]]
    full_day = DayInputs(date=START, measures={"rolling:63": measure_day(matrix)})
    pair_day = DayInputs(date=START, measures={"rolling:63": measure_day(per_pair)},
                         layout=PairLayout(layout_pairs, n))
    from_matrix = rule.evaluate(full_day)
    from_pairs = rule.evaluate(pair_day)
    np.testing.assert_array_equal(from_matrix.value, matrix[pairs[:, 0], pairs[:, 1]])
    np.testing.assert_array_equal(from_pairs.value, from_matrix.value)
    np.testing.assert_array_equal(from_pairs.breach, from_matrix.breach)


class BandlessMeasure:
    """A measure whose confidence band must not be read (it would be costly to compute)."""

    def __init__(self, value: list[float]) -> None:
        self.value = np.asarray(value, dtype=np.float64)
        self.n = np.full(self.value.shape, 63.0)
        self.stale = np.zeros(self.value.shape, dtype=bool)

    @property
    def low(self) -> np.ndarray:
        raise AssertionError("band read")

    @property
    def high(self) -> np.ndarray:
        raise AssertionError("band read")


def test_rules_read_the_band_only_when_they_need_it() -> None:
    plain = one(kind="level", above=0.7, pairs=["KLV/ORMA", "KLV/VESK"])
    confident = one(kind="level", above=0.7, require_band=True, variance="fisher",
                    pairs=["KLV/ORMA", "KLV/VESK"])
    quiet = {"rolling:63": BandlessMeasure([0.2, 0.3])}
    book = AlertBook()
    assert book.step(plain, plain.evaluate(day_for(plain, quiet)), START) == []
    with pytest.raises(AssertionError, match="band read"):
        confident.evaluate(day_for(confident, quiet))


def test_layout_missing_a_rule_pair_is_a_wiring_error() -> None:
    rule = one(kind="level", above=0.5, group="equities")
    day = DayInputs(date=START, measures={"rolling:63": measure_day([0.1])},
                    layout=PairLayout([[0, 1]], len(SYMBOLS)))
    with pytest.raises(ValueError, match=r"pair \(0, 2\) is not in the layout"):
        rule.evaluate(day)


def test_measure_not_supplied_is_a_wiring_error() -> None:
    rule = one(kind="level", above=0.5, group="equities")
    with pytest.raises(KeyError, match="rolling:63"):
        rule.evaluate(DayInputs(date=START, measures={}))


# --- level -----------------------------------------------------------------------------


def test_level_breach_clear_and_nan_arrays() -> None:
    rule = one(kind="level", above=0.7, pairs=["KLV/ORMA", "KLV/VESK", "ORMA/VESK"])
    # One pair per row of the day: breach, dead-band, cleared; a fourth day for NaN.
    condition = rule.evaluate(day_for(rule, {"rolling:63": measure_day([0.75, 0.68, 0.6])}))
    np.testing.assert_array_equal(condition.breach, [True, False, False])
    np.testing.assert_array_equal(condition.clear, [False, False, True])
    missing = rule.evaluate(day_for(rule, {"rolling:63": measure_day([np.nan] * 3)}))
    assert not missing.breach.any() and not missing.clear.any() and not missing.known.any()


def test_level_default_clear_is_the_level_minus_the_dead_band() -> None:
    above = one(kind="level", above=0.7, all=True)
    below = one(kind="level", below=-0.3, all=True)
    assert above.threshold.clear_level == 0.65  # type: ignore[attr-defined]
    assert below.threshold.clear_level == -0.25  # type: ignore[attr-defined]


def test_level_below_mirrors_above() -> None:
    rule = one(kind="level", below=-0.3, clear=-0.1, pairs=["KLV/ORMA", "KLV/VESK", "ORMA/VESK"])
    condition = rule.evaluate(day_for(rule, {"rolling:63": measure_day([-0.35, -0.2, 0.0])}))
    np.testing.assert_array_equal(condition.breach, [True, False, False])
    np.testing.assert_array_equal(condition.clear, [False, False, True])
    np.testing.assert_allclose(condition.excess, [0.05, -0.1, -0.3])


def test_confident_level_opens_only_when_the_band_is_beyond_the_level() -> None:
    rule = one(kind="level", above=0.7, require_band=True, variance="fisher", pairs=["KLV/ORMA"])
    values = [0.80, 0.80, 0.80]
    lows = [0.65, 0.69, 0.72]
    days = [
        day_for(rule, {"rolling:63": measure_day([v], low=[lo], high=[v + 0.1])}, offset=k)
        for k, (v, lo) in enumerate(zip(values, lows, strict=True))
    ]
    assert summary(run(rule, days)) == [("opened", "KLV/ORMA", 2)]
    plain = one(kind="level", above=0.7, pairs=["KLV/ORMA"])
    assert summary(run(plain, days)) == [("opened", "KLV/ORMA", 0)]


def test_confident_below_uses_the_band_high() -> None:
    rule = one(kind="level", below=-0.5, require_band=True, variance="fisher", pairs=["KLV/ORMA"])
    inside = rule.evaluate(day_for(rule, {"rolling:63": measure_day([-0.7], high=[-0.45])}))
    beyond = rule.evaluate(day_for(rule, {"rolling:63": measure_day([-0.7], high=[-0.55])}))
    assert not inside.breach[0] and beyond.breach[0]


# --- shift -----------------------------------------------------------------------------


def test_difference_of_independent_correlations_matches_published_example() -> None:
    """Documentation example of R package psych, function r.test (REFERENCES.md):
    r1 = 0.5, n1 = 100 vs r2 = 0.4, n2 = 80 -> z = 0.82, two-sided p = 0.41."""
    z = fisher_difference(np.array([0.5]), np.array([100.0]), np.array([0.4]), np.array([80.0]),
                          nested=False)
    assert round(float(z[0]), 2) == 0.82
    assert round(float(two_sided_p(z)[0]), 2) == 0.41


def test_two_sided_p_agrees_with_math_erfc() -> None:
    """Reference: Python's math.erfc; p = erfc(|z| / sqrt 2) is the two-sided normal tail."""
    z = np.linspace(-12, 12, 2401)
    expected = np.array([math.erfc(abs(v) / math.sqrt(2.0)) for v in z])
    np.testing.assert_allclose(two_sided_p(z), expected, rtol=2e-7)
    assert np.isnan(two_sided_p(np.array([np.nan]))[0])


def test_nested_variance_is_the_difference_of_the_two_inverses() -> None:
    """REFERENCES.md: for nested windows var(z_s - z_l) ~ 1/(n_s - 3) - 1/(n_l - 3)."""
    z = fisher_difference(np.array([0.9]), np.array([21.0]), np.array([0.3]), np.array([126.0]),
                          nested=True)
    by_hand = (math.atanh(0.9) - math.atanh(0.3)) / math.sqrt(1 / 18 - 1 / 123)
    assert float(z[0]) == pytest.approx(by_hand, rel=1e-12)


def test_fisher_difference_is_nan_without_enough_observations() -> None:
    z = fisher_difference(np.array([0.9, 0.9, np.nan]), np.array([3.0, 126.0, 21.0]),
                          np.array([0.3, 0.3, 0.3]), np.array([126.0, 21.0, 126.0]), nested=True)
    assert np.isnan(z).all()


def test_nested_shift_rule_opens_on_large_z_and_reports_p() -> None:
    rule = one(kind="shift", measure="rolling:21", baseline="rolling:126", variance="fisher",
               z=3.0, pairs=["KLV/ORMA", "KLV/VESK"])
    day = day_for(rule, {
        "rolling:21": measure_day([0.9, 0.35], n=21.0),
        "rolling:126": measure_day([0.3, 0.3], n=126.0),
    })
    condition = rule.evaluate(day)
    np.testing.assert_array_equal(condition.breach, [True, False])
    np.testing.assert_array_equal(condition.clear, [False, True])
    np.testing.assert_allclose(condition.reference, [0.3, 0.3])
    expected_p = [math.erfc(abs(z) / math.sqrt(2)) for z in condition.z]
    np.testing.assert_allclose(condition.p, expected_p, rtol=2e-7)


def test_adjacent_shift_compares_with_the_window_before() -> None:
    rule = one(kind="shift", measure="rolling:21", compare="previous", z=2.0, variance="fisher",
               pairs=["KLV/ORMA"])
    assert rule.lags() == [("rolling:21", 21)]
    day = day_for(rule, {"rolling:21": measure_day([0.8], n=21.0)},
                  lagged={("rolling:21", 21): measure_day([0.1], n=21.0)})
    condition = rule.evaluate(day)
    # Disjoint windows: the variances add (REFERENCES.md, two independent correlations).
    by_hand = (math.atanh(0.8) - math.atanh(0.1)) / math.sqrt(2 / 18)
    assert float(condition.z[0]) == pytest.approx(by_hand, rel=1e-12)
    assert condition.breach[0]


def test_rank_shift_widens_the_variance_by_the_spearman_factor() -> None:
    """Fieller, Hartley & Pearson (1957): var(atanh r_s) ~ 1.06/(n - 3) (typed from memory)."""
    rank = one(kind="shift", measure="rank:21", compare="previous", variance="fisher",
               pairs=["KLV/ORMA"])
    pearson = one(kind="shift", measure="rolling:21", compare="previous", variance="fisher",
                  pairs=["KLV/ORMA"])
    now, before = measure_day([0.8], n=21.0), measure_day([0.1], n=21.0)
    z_rank = rank.evaluate(day_for(rank, {"rank:21": now}, lagged={("rank:21", 21): before})).z
    z_pearson = pearson.evaluate(
        day_for(pearson, {"rolling:21": now}, lagged={("rolling:21", 21): before})
    ).z
    assert float(z_pearson[0] / z_rank[0]) == pytest.approx(math.sqrt(1.06), rel=1e-12)


def test_adjacent_shift_without_the_lagged_window_is_a_wiring_error() -> None:
    rule = one(kind="shift", measure="rolling:21", compare="previous", pairs=["KLV/ORMA"])
    with pytest.raises(KeyError, match="rolling:21"):
        rule.evaluate(day_for(rule, {"rolling:21": measure_day([0.8], n=21.0)}))


def test_shift_alert_opens_after_hold_days_and_clears_below_clear_z() -> None:
    rule = one(kind="shift", measure="rolling:21", baseline="rolling:126", hold=2, z=3.0,
               variance="fisher", pairs=["KLV/ORMA"])
    shorts = [0.3, 0.9, 0.9, 0.7, 0.35]  # z: ~0, >3, >3, between 2 and 3, < 2
    days = [
        day_for(rule, {"rolling:21": measure_day([r], n=21.0),
                       "rolling:126": measure_day([0.3], n=126.0)}, offset=k)
        for k, r in enumerate(shorts)
    ]
    z = [float(rule.evaluate(d).z[0]) for d in days]
    assert abs(z[0]) < 2 and z[1] > 3 and 2 < z[3] < 3 and abs(z[4]) < 2
    events = run(rule, days)
    assert summary(events) == [("opened", "KLV/ORMA", 2), ("cleared", "KLV/ORMA", 4)]
    opened = events[0]
    assert (opened.z, opened.reference, opened.n) == (z[2], 0.3, 21.0)
    assert opened.p == pytest.approx(math.erfc(abs(z[2]) / math.sqrt(2)), rel=2e-7)


# --- jump ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("direction", "breach", "clear"),
    [
        ("either", [True, True, False, False], [False, False, False, True]),
        ("up", [True, False, False, False], [False, True, False, True]),
        ("down", [False, True, False, False], [True, False, True, True]),
    ],
)
def test_jump_direction_breach_and_half_delta_clear(
    direction: str, breach: list[bool], clear: list[bool]
) -> None:
    rule = one(kind="jump", delta=0.3, over_days=5, direction=direction,
               pairs=["KLV/ORMA", "KLV/VESK", "ORMA/VESK", "TEZ10/LUMA5"])
    # Moves: +0.3 (exactly delta), -0.4, +0.2 (between delta/2 and delta), +0.1.
    today = measure_day([0.6, 0.0, 0.5, 0.2])
    before = measure_day([0.3, 0.4, 0.3, 0.1])
    condition = rule.evaluate(day_for(rule, {"rolling:63": today},
                                      lagged={("rolling:63", 5): before}))
    np.testing.assert_array_equal(condition.breach, breach)
    np.testing.assert_array_equal(condition.clear, clear)
    np.testing.assert_allclose(condition.reference, [0.3, 0.4, 0.3, 0.1])


def test_jump_opens_on_the_move_and_clears_when_the_move_fades() -> None:
    rule = one(kind="jump", delta=0.3, over_days=2, pairs=["KLV/ORMA"])
    series = [0.2, 0.2, 0.25, 0.55, 0.6, 0.62, 0.64]
    days = []
    for k, value in enumerate(series):
        lagged = measure_day([series[k - 2]]) if k >= 2 else MeasureDay.missing(1)
        days.append(day_for(rule, {"rolling:63": measure_day([value])},
                            lagged={("rolling:63", 2): lagged}, offset=k))
    # Moves over 2 days: -, -, 0.05, 0.35, 0.35, 0.07, 0.04.
    assert summary(run(rule, days)) == [("opened", "KLV/ORMA", 3), ("cleared", "KLV/ORMA", 5)]


# --- sign ------------------------------------------------------------------------------


def test_sign_opens_when_the_band_is_wholly_on_the_other_side_and_clears_at_zero() -> None:
    rule = one(kind="sign", expected="positive", variance="fisher", pairs=["KLV/ORMA"])
    bands = [(0.1, 0.3), (-0.3, 0.05), (-0.45, -0.05), (-0.5, -0.1), (-0.2, 0.0), (0.1, 0.4)]
    days = [
        day_for(rule, {"rolling:63": measure_day([(lo + hi) / 2], low=[lo], high=[hi])}, offset=k)
        for k, (lo, hi) in enumerate(bands)
    ]
    assert summary(run(rule, days)) == [("opened", "KLV/ORMA", 2), ("cleared", "KLV/ORMA", 4)]


def test_sign_expected_negative_mirrors_positive() -> None:
    rule = one(kind="sign", expected="negative", variance="fisher",
               pairs=["TEZ10/LUMA5", "KLV/ORMA"])
    condition = rule.evaluate(day_for(rule, {"rolling:63": measure_day(
        [0.3, 0.05], low=[0.1, -0.1], high=[0.5, 0.2])}))
    # Canonical order: KLV/ORMA (band wholly positive) first, then TEZ10/LUMA5 (band spans 0).
    np.testing.assert_array_equal(condition.breach, [True, False])
    np.testing.assert_array_equal(condition.clear, [False, True])


# --- group-average ----------------------------------------------------------------------------


def test_group_average_averages_the_pairs_inside_each_group() -> None:
    rule = one(kind="group-average", above=0.6, group=["equities", "rates"])
    assert rule.targets.labels == ("equities", "rates")
    pairs = rule.pairs_needed()
    # Pairs: KLV/ORMA, KLV/VESK, ORMA/VESK (equities), then TEZ10/LUMA5 (rates).
    np.testing.assert_array_equal(pairs, [[0, 1], [0, 2], [1, 2], [3, 4]])
    condition = rule.evaluate(day_for(rule, {"rolling:63": measure_day([0.5, 0.7, 0.9, 0.2])}))
    np.testing.assert_allclose(condition.value, [0.7, 0.2])
    np.testing.assert_allclose(condition.n, [3, 1])
    np.testing.assert_array_equal(condition.breach, [True, False])


def test_group_average_average_needs_the_minimum_coverage() -> None:
    rule = one(kind="group-average", above=0.6, group="equities", min_coverage=0.5)
    enough = rule.evaluate(day_for(rule, {"rolling:63": measure_day([0.8, np.nan, 0.9])}))
    thin = rule.evaluate(day_for(rule, {"rolling:63": measure_day([0.8, np.nan, np.nan])}))
    assert float(enough.value[0]) == pytest.approx(0.85)
    assert np.isnan(thin.value[0]) and not thin.known[0]


def test_group_average_alert_opens_and_clears_with_the_dead_band() -> None:
    rule = one(kind="group-average", above=0.6, clear=0.5, hold=2, group="equities")
    averages = [0.4, 0.65, 0.7, 0.55, 0.62, 0.45]
    days = [day_for(rule, {"rolling:63": measure_day([a, a, a])}, offset=k)
            for k, a in enumerate(averages)]
    assert summary(run(rule, days)) == [("opened", "equities", 2), ("cleared", "equities", 5)]


def test_all_group_averages_means_every_group_of_two_or_more() -> None:
    rule = one(kind="group-average", above=0.6, all=True)
    assert rule.targets.labels == ("equities", "rates")


# --- stale -----------------------------------------------------------------------------


def test_stale_counts_missing_and_unchanged_closes() -> None:
    rule = build({"name": "t", "kind": "stale", "after_days": 3,
                  "symbols": ["KLV", "ORMA", "VESK"]})[0]
    missing = np.array([0, 4, 0, 0, 0, 0], dtype=np.float64)
    flat = np.array([3, 0, np.nan, 0, 0, 0], dtype=np.float64)
    condition = rule.evaluate(DayInputs(date=START, measures={}, days_without_close=missing,
                                        days_unchanged=flat))
    np.testing.assert_array_equal(condition.breach, [True, True, False])
    np.testing.assert_array_equal(condition.known, [True, True, False])
    ignore_flat = build({"name": "t", "kind": "stale", "after_days": 3, "unchanged": False,
                         "symbols": ["KLV", "ORMA", "VESK"]})[0]
    condition = ignore_flat.evaluate(DayInputs(date=START, measures={}, days_without_close=missing))
    np.testing.assert_array_equal(condition.breach, [False, True, False])


def test_stale_alert_opens_at_days_and_clears_on_a_fresh_close() -> None:
    rule = build({"name": "t", "kind": "stale", "after_days": 3, "group": "rates"})[0]
    assert rule.targets.labels == ("TEZ10", "LUMA5")
    counts = [0, 1, 2, 3, 4, 0]
    days = []
    for k, count in enumerate(counts):
        missing = np.zeros(len(SYMBOLS))
        missing[3] = count
        days.append(DayInputs(date=START + datetime.timedelta(days=k), measures={},
                              days_without_close=missing, days_unchanged=np.zeros(len(SYMBOLS))))
    assert summary(run(rule, days)) == [("opened", "TEZ10", 3), ("cleared", "TEZ10", 5)]
    opened = run(rule, days)[0]
    assert opened.symbols == (3,) and opened.value == 3.0 and opened.level == 3.0


def test_stale_rule_without_its_inputs_is_a_wiring_error() -> None:
    rule = build({"name": "t", "kind": "stale", "all": True})[0]
    with pytest.raises(KeyError, match="days_without_close"):
        rule.evaluate(DayInputs(date=START, measures={}))


def test_rules_and_alerts_import_no_storage_rendering_or_scheduling() -> None:
    """DESIGN.md dependency rule: monitor.rules and monitor.alerts.book are pure."""
    import subprocess
    import sys

    code = (
        "import sys, monitor.rules, monitor.alerts.book; "
        "print(sorted({m.split('.')[0] for m in sys.modules} & "
        "{'storage', 'sqlalchemy', 'jinja2', 'matplotlib', 'apscheduler'}))"
    )
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            check=True)
    assert result.stdout.strip() == "[]"


# --- shift: robust variance, calibrated threshold, false discovery rate ------------------


def _fat_tailed_panel(instruments: int, years: int, seed: int, *, break_row: int | None = None,
                      new_rho: float = 0.9) -> np.ndarray:
    """Every pair correlated 0.36 (one factor, loading 0.6); factor and idiosyncratic shocks
    Student t(4) scaled to unit variance; one GARCH(1,1)-like variance common to all
    instruments (alpha 0.08, beta 0.87: persistence 0.95). From ``break_row`` on, the first
    two instruments load ``sqrt(new_rho)`` on a factor of their own (a planted break)."""
    rng = np.random.default_rng(seed)
    rows = 252 * years

    def shocks(shape: tuple[int, int]) -> np.ndarray:
        return rng.standard_t(4, size=shape) / math.sqrt(2.0)

    factor, own, idio = shocks((rows, 1)), shocks((rows, 1)), shocks((rows, instruments))
    unit = 0.6 * factor + 0.8 * idio
    if break_row is not None:
        load = math.sqrt(new_rho)
        rest = math.sqrt(1 - load**2) * idio[break_row:, :2]
        unit[break_row:, :2] = load * own[break_row:] + rest
    variance, level = np.empty(rows), 1.0
    for t in range(rows):
        variance[t] = level
        level = 0.05 + 0.08 * level * float(factor[t, 0]) ** 2 + 0.87 * level
    return 0.01 * unit * np.sqrt(variance)[:, None]


def _openings(returns: np.ndarray, table: dict[str, object]) -> tuple[Rule, list[AlertEvent]]:
    from monitor.alerts.replay import make_plan, replay

    symbols = [f"S{k:02d}" for k in range(returns.shape[1])]
    (rule,) = build_rules([{"name": "t", "kind": "shift", "all": True, **table}],
                          symbols=symbols, groups={}, default_measure=None)
    plan = make_plan([rule], symbols, level=0.95)
    dates = [START + datetime.timedelta(days=k) for k in range(returns.shape[0])]
    events = [e for day in replay(returns, dates, plan, AlertBook()) for e in day.events]
    return rule, [e for e in events if e.event == "opened"]


@pytest.mark.parametrize("table", [
    {"measure": "rolling:21", "baseline": "rolling:126"},
    {"measure": "rolling:63", "compare": "previous"},
])
def test_constant_fat_tailed_panel_raises_few_shift_alerts_at_the_defaults(
    table: dict[str, object]
) -> None:
    """12 instruments x 10 years (66 pairs, about 620 pair-years after the warm-up): at the
    default 0.01 per pair per year about 6 false alerts are expected at most; the check
    allows 15 (a Poisson(6) count exceeds 15 once in a thousand). The old defaults
    (Fisher variance, z = 3) raise hundreds on the same panel."""
    returns = _fat_tailed_panel(12, 10, seed=31)
    _, opened = _openings(returns, table)
    assert len(opened) <= 15
    _, old = _openings(returns, {**table, "variance": "fisher", "z": 3.0})
    assert len(old) > 100


def test_planted_break_is_found_by_the_default_nested_shift() -> None:
    returns = _fat_tailed_panel(6, 3, seed=32, break_row=500, new_rho=0.9)
    _, opened = _openings(returns, {"measure": "rolling:21", "baseline": "rolling:126"})
    hits = [e for e in opened if e.target == "S00/S01"]
    assert hits, "the break from 0.36 to 0.9 is not found"
    first = (hits[0].date - START).days
    assert 500 <= first <= 500 + 42  # found within two short windows of the break
    assert len(opened) - len(hits) <= 2


def test_robust_shift_reads_standardised_measures_and_divides_z_by_the_tail_factor() -> None:
    robust = one(kind="shift", measure="rolling:21", baseline="rolling:126", z=3.0,
                 pairs=["KLV/ORMA"])
    fisher = one(kind="shift", measure="rolling:21", baseline="rolling:126", z=3.0,
                 variance="fisher", pairs=["KLV/ORMA"])
    assert robust.measures() == ["rolling:21,scale=vol", "rolling:126,scale=vol"]
    assert robust.history_rows() == 252 and fisher.history_rows() == 0
    rng = np.random.default_rng(33)
    history = rng.standard_t(5, size=(252, len(SYMBOLS)))
    from monitor.engine.variance import pair_tail_factor
    phi = float(pair_tail_factor(history, [[0, 1]])[0])
    assert phi > 1.2
    short, long = measure_day([0.8], n=21.0), measure_day([0.3], n=126.0)
    z_robust = robust.evaluate(day_for(robust, {"rolling:21,scale=vol": short,
                                                "rolling:126,scale=vol": long},
                                       scaled_history=history)).z[0]
    z_fisher = fisher.evaluate(day_for(fisher, {"rolling:21": short, "rolling:126": long})).z[0]
    assert z_fisher / z_robust == pytest.approx(math.sqrt(phi), rel=1e-12)
    with pytest.raises(KeyError, match="scaled_history"):
        robust.evaluate(day_for(robust, {"rolling:21,scale=vol": short,
                                         "rolling:126,scale=vol": long}))


def test_method_notes_say_which_variance_and_setting_stand_behind_alerts() -> None:
    calibrated = one(kind="shift", measure="rolling:21", baseline="rolling:126", all=True)
    assert calibrated.method_note() == (
        "robust variance (returns standardised by EWMA volatility, Fisher variance times the "
        "tail factor); threshold |z| > 4.29 for 0.01 false alerts per pair per year.")
    raw = one(kind="shift", measure="rolling:63", compare="previous", variance="fisher", z=3.5,
              all=True)
    assert raw.method_note() == ("Fisher variance 1/(n - 3) (assumes independent normal "
                                 "returns); raw threshold |z| > 3.5 (no false-alarm rate stated).")
    rarer = one(kind="shift", measure="rolling:21", baseline="rolling:126", false_alarms=0.001,
                all=True)
    assert rarer.z_level > calibrated.z_level  # type: ignore[attr-defined]
    by = one(kind="shift", measure="rolling:21", baseline="rolling:126", fdr="by", fdr_level=0.1,
             all=True)
    assert "Benjamini-Yekutieli at false discovery rate 0.1" in str(by.method_note())


def test_fdr_shift_breaches_the_pairs_benjamini_hochberg_rejects() -> None:
    rule = one(kind="shift", measure="rolling:21", baseline="rolling:126", variance="fisher",
               fdr="bh", all=True)
    size = len(rule.targets.pairs)
    shorts = np.full(size, 0.3)
    shorts[:3] = [0.85, 0.75, 0.62]
    shorts[4] = np.nan
    condition = rule.evaluate(day_for(rule, {"rolling:21": measure_day(shorts, n=21.0),
                                             "rolling:126": measure_day([0.3] * size, n=126.0)}))
    from scipy.stats import false_discovery_control
    known = np.isfinite(condition.z)
    p = two_sided_p(condition.z[known])
    expected = false_discovery_control(p, method="bh") <= 0.05  # scipy reference
    np.testing.assert_array_equal(condition.breach[known], expected)
    assert condition.breach[:2].all() and not condition.breach[4] and not condition.known[4]
    assert not (condition.breach & condition.clear).any()


@pytest.mark.parametrize(
    ("table", "message"),
    [
        ({"variance": "huber"},
         "rules[0] (t).variance: 'huber' is not one of robust, fisher"),
        ({"fdr": "bonferroni"}, "rules[0] (t).fdr: 'bonferroni' is not one of none, bh, by"),
        ({"false_alarms": 0.0},
         "rules[0] (t).false_alarms: 0.0 must be above 0 and below 1 (expected false alerts "
         "per pair per year)"),
        ({"false_alarms": "often"},
         "rules[0] (t).false_alarms: expected a number, got 'often' (str)"),
        ({"false_alarms": 0.01, "z": 3.0},
         "rules[0] (t).z: set either z (a raw threshold) or false_alarms, not both"),
        ({"fdr": "bh", "z": 3.0},
         "rules[0] (t).z: not used with fdr = 'bh' (the day's p-values decide)"),
        ({"fdr_level": 0.1}, "rules[0] (t).fdr_level: only used with fdr = 'bh' or 'by'"),
        ({"fdr": "by", "fdr_level": 1.5},
         "rules[0] (t).fdr_level: 1.5 must be above 0 and below 1"),
    ],
)
def test_bad_shift_variance_fdr_and_rate_settings_are_one_line_errors(
    table: dict[str, object], message: str
) -> None:
    text = error_of({"name": "t", "kind": "shift", "measure": "rolling:21",
                     "baseline": "rolling:126", "all": True, **table})
    assert text == message
    assert "\n" not in text
