"""The backfill benchmark runs end to end, with and without market gaps (timings are printed,
not asserted)."""

from __future__ import annotations

import json

import pytest

from monitor.bench.backfill_speed import main


@pytest.mark.slow
def test_quick_gappy_backfill_reports_its_figures(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--quick", "--json", "--gaps"]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert figures["gaps"] is True
    # five markets' closed days plus 0.5 % at random
    assert 0.02 < figures["missing_share"] < 0.1
    assert figures["total_seconds"] > 0 and figures["peak_memory_mb"] > 0
    assert figures["alerts_opened"] > 0
