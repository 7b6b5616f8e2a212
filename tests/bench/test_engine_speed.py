"""The engine benchmark runs and reports every figure (not timings: those are printed)."""

from __future__ import annotations

import json

import pytest

from monitor.bench.engine_speed import main


@pytest.mark.slow
def test_quick_benchmark_prints_json_with_every_figure(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--quick", "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert set(figures) >= {"machine", "versus_pandas", "floor", "one_day", "memory", "all_ok"}
    assert len(figures["versus_pandas"]) == 4
    for line in figures["versus_pandas"]:
        assert set(line) >= {
            "measure",
            "gaps",
            "engine_s",
            "pandas_s",
            "ratio",
            "max_abs_difference",
            "polars_s",
            "polars_ratio",
            "polars_max_abs_difference",
            "ratio_ok",
            "difference_ok",
        }
        # same estimator as pandas: the values agree whatever the timings
        assert line["max_abs_difference"] <= 1e-10 and line["cells_defined_in_one_only"] == 0
        assert line["polars_max_abs_difference"] <= 1e-10
    gappy = [line for line in figures["versus_pandas"] if line["gaps"]]
    # market holidays of five exchanges plus 0.5 % at random
    assert len(gappy) == 2 and all(0.02 < line["missing_share"] < 0.1 for line in gappy)
    assert figures["floor"]["seconds"] > 0 and figures["floor"]["days_computed"] > 0
    assert {line["measure"] for line in figures["one_day"]} == {
        "rolling:63",
        "rolling:252",
        "ewma:hl=21",
        "rolling:63,min=40",
    }
    assert all(line["seconds"] > 0 for line in figures["one_day"])
    assert set(figures["memory"]) >= {"traced_peak_bytes", "max_rss_bytes", "seconds", "ok"}
    assert figures["memory"]["traced_peak_bytes"] > 0
    assert {line["measure"] for line in figures["regression"]} == {
        "beta:63", "r2:63", "beta:hl=21", "r2:hl=21"}
    assert all(line["seconds"] > 0 and line["versus_seconds"] > 0
               for line in figures["regression"])
