"""`comove bench alerts --quick --json` runs the production rules and reports every figure
(the figures themselves are measured, not asserted; see README for a full run)."""

from __future__ import annotations

import json
import math
import subprocess
import sys

import pytest

from monitor.bench.alert_quality import BREAKS, RULES, TAILS, markdown
from monitor.rules.sequential import lorden_floor


@pytest.mark.slow
def test_quick_alerts_bench_prints_json_with_every_field() -> None:
    out = subprocess.run(
        [sys.executable, "-m", "monitor", "bench", "alerts", "--quick", "--json"],
        capture_output=True, text=True, check=True, timeout=300,
    )
    result = json.loads(out.stdout)
    names = [table["name"] for table in RULES]
    assert result["rules"] == names
    for tail in TAILS:
        rates = result["false_alerts_per_1000_pair_years"][tail]
        assert set(rates) == set(names)
        assert all(rate >= 0 and math.isfinite(rate) for rate in rates.values())
        for after in BREAKS:
            row = result["delay_business_days"][tail][f"0.6->{after}"]
            for name in names:
                entry = row[name]
                assert 0 <= entry["missed"] <= entry["breaks"] == result["breaks_per_size"]
                # A median exists exactly when at most half the breaks were missed.
                assert (entry["median"] is None) == (entry["missed"] > entry["breaks"] // 2)
    floors = result["lorden_floor_business_days"]
    assert floors["normal"]["0.6->-0.1"] == pytest.approx(lorden_floor(0.6, -0.1, 0.01),
                                                          abs=0.05)
    # Fat tails carry less information about the correlation: a longer floor.
    assert floors["t-garch"]["0.6->-0.1"] > floors["normal"]["0.6->-0.1"]
    table = markdown(result)
    assert table.count("\n") == len(names) + 2 and "Lorden" in table
