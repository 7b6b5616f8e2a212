"""The scale benchmark runs end to end at its quick size and reports every figure (the
timings are printed, never asserted); a kept store is reused by the next run."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from monitor.bench.daily_scale import main


@pytest.mark.slow
def test_quick_scale_benchmark_reports_every_figure_and_reuses_its_store(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    store = tmp_path / "kept"
    assert main(["--quick", "--json", "--store", str(store)]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert figures["setup"] == "built" and figures["instruments"] == 60
    assert figures["pairs"] == 60 * 59 // 2 and figures["alerts_opened"] > 0
    for key in ("digest_seconds", "digest_peak_mb", "pages_seconds", "pages_peak_mb",
                "pages_rebuild_seconds"):
        assert figures[key] > 0, key
    # The email is the real .eml: its size and its charts come from parsing it.
    assert 10_000 < figures["email_bytes"] < 2_000_000 and figures["email_charts"] >= 0
    assert "correlation digest" in figures["subject"]
    assert figures["pages_files"] > 10 and figures["pages_charts_drawn"] > 0
    # Nothing changed between the two builds: no chart is drawn again.
    assert figures["rebuild_charts_drawn"] == 0
    assert {"digest_ok", "email_ok", "pages_ok"} <= set(figures)
    assert main(["--quick", "--store", str(store)]) == 0
    printed = capsys.readouterr().out
    assert "store reused" in printed and "digest" in printed and "pages rebuild" in printed
