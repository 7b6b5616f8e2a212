"""`comove demo`: every planted episode raises its alert, the digest shows the open ones,
every link of the pages resolves, a rerun changes nothing, and a plain install runs it."""

from __future__ import annotations

import datetime as dt
import os
import re
import subprocess
from pathlib import Path
from urllib.parse import unquote, urlparse

import pandas as pd
import pytest

from monitor.config import load_settings
from monitor.demo.model import Episode, trading_days
from monitor.demo.run import DEMO_END, DEMO_SEED, DEMO_START, DemoReport, run_demo
from monitor.demo.scenario import demo_scenario
from monitor.pipeline import open_settings_store
from storage import alerts as alerts_store
from storage import closes as closes_store

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> DemoReport:
    return run_demo(tmp_path_factory.mktemp("demo") / "desk")


@pytest.fixture(scope="module")
def alerts(demo: DemoReport) -> list[alerts_store.AlertRow]:
    store = open_settings_store(load_settings(demo.settings_file))
    with store.connect() as conn:
        rows = alerts_store.list_alerts(conn)
    store.dispose()
    return rows


def _episode(kind: str, symbol: str | None = None) -> Episode:
    scenario = demo_scenario(DEMO_START, DEMO_END, seed=DEMO_SEED)
    return next(e for e in scenario.episodes
                if e.kind == kind and (symbol is None or symbol in e.symbols))


def _business_days(start: dt.date, end: dt.date) -> int:
    scenario = demo_scenario(DEMO_START, DEMO_END, seed=DEMO_SEED)
    days = trading_days(DEMO_START, DEMO_END, scenario.holidays)
    return int(((days >= pd.Timestamp(start)) & (days <= pd.Timestamp(end))).sum()) - 1


def _first(alerts: list[alerts_store.AlertRow], rule: str, target: str | None,
           after: dt.date) -> alerts_store.AlertRow:
    found = sorted((a for a in alerts if a.rule == rule and a.opened_on >= after
                    and (target is None or target in a.target.split("/") or a.target == target)),
                   key=lambda a: a.opened_on)
    assert found, f"no {rule} alert for {target} after {after}"
    return found[0]


def test_the_hedge_break_opens_the_breakdown_and_the_shift_alerts(
    alerts: list[alerts_store.AlertRow]
) -> None:
    episode = _episode("decouple")
    breakdown = _first(alerts, "hedge-breakdown", "KLV/DUNQ", episode.start)
    # rolling:63 below 0.4: about half the window must be decoupled, plus hold = 3
    assert _business_days(episode.start, breakdown.opened_on) <= 45
    shift = _first(alerts, "hedge-regime-shift", "KLV/DUNQ", episode.start)
    assert _business_days(episode.start, shift.opened_on) <= 25
    assert breakdown.state == "open" and shift.state == "open"  # runs to the end


def test_the_credit_stress_opens_the_group_alert(alerts: list[alerts_store.AlertRow]) -> None:
    episode = _episode("stress")
    crowding = _first(alerts, "credit-crowding", "credit", episode.start)
    assert _business_days(episode.start, crowding.opened_on) <= 20
    assert crowding.opened_on <= episode.end


def test_the_bond_flip_opens_sign_alerts_that_clear_after_it(
    alerts: list[alerts_store.AlertRow]
) -> None:
    episode = _episode("flip")
    flips = [a for a in alerts if a.rule == "bond-equity-sign"
             and episode.start <= a.opened_on <= episode.end]
    assert flips, "no sign alert while the bond moved with equities"
    assert _business_days(episode.start, min(a.opened_on for a in flips)) <= 80
    latest = max(flips, key=lambda a: a.opened_on)
    assert latest.cleared_on is not None
    assert _business_days(episode.end, latest.cleared_on) <= 63


@pytest.mark.parametrize("symbol", ["ZLFKRD", "PVLKRD"])
def test_each_stale_feed_opens_and_clears_a_stale_alert(
    alerts: list[alerts_store.AlertRow], symbol: str
) -> None:
    episode = _episode("stale", symbol)
    stale = _first(alerts, "stale-closes", symbol, episode.start)
    assert _business_days(episode.start, stale.opened_on) <= 4
    assert stale.cleared_on is not None and stale.cleared_on > episode.end
    assert _business_days(episode.end, stale.cleared_on) <= 3


def test_the_bad_tick_is_kept_but_flagged(demo: DemoReport) -> None:
    episode = _episode("bad_tick")
    store = open_settings_store(load_settings(demo.settings_file))
    with store.connect() as conn:
        suspects = closes_store.list_suspects(conn)
    store.dispose()
    flagged = suspects.loc[suspects["symbol"] == "GSV1", "date"].tolist()
    assert episode.start in flagged


def test_the_latest_digest_shows_the_open_alerts(demo: DemoReport,
                                                 alerts: list[alerts_store.AlertRow]) -> None:
    from bs4 import BeautifulSoup

    html = demo.digest.paths.html.read_text(encoding="utf-8")
    text = BeautifulSoup(html, "html.parser").get_text(" ", strip=True)
    for alert in (a for a in alerts if a.state == "open"):
        assert alert.rule in text
    assert "KLV Kelvara Industrial / DUNQ" in text
    assert "not investment advice" in text.lower() or "is investment advice" in text


def test_every_link_in_the_pages_resolves(demo: DemoReport) -> None:
    site = demo.pages_index.parent
    pages = list(site.rglob("*.html"))
    assert len(pages) > 10
    for page in pages:
        if "digests" in page.relative_to(site).parts:
            continue  # archived digests link only their own images, checked below
        for link in re.findall(r'(?:href|src)="([^"]+)"', page.read_text(encoding="utf-8")):
            parsed = urlparse(link)
            if parsed.scheme or link.startswith("#"):
                assert not parsed.scheme.startswith("http"), f"{page}: external {link}"
                continue
            target = (page.parent / unquote(parsed.path)).resolve()
            assert target.is_file(), f"{page.relative_to(site)} links {link}"
    for digest in site.glob("digests/*/digest.html"):
        for src in re.findall(r'src="([^"]+)"', digest.read_text(encoding="utf-8")):
            assert (digest.parent / src).is_file()


def test_a_rerun_is_idempotent(demo: DemoReport, alerts: list[alerts_store.AlertRow]) -> None:
    again = run_demo(demo.folder)
    assert again.files_written == 0 and again.files_ingested == 0
    assert again.evaluation.days_written == 0
    store = open_settings_store(load_settings(demo.settings_file))
    with store.connect() as conn:
        after = alerts_store.list_alerts(conn)
    store.dispose()
    key = [(a.rule, a.target, a.opened_on, a.state, a.cleared_on) for a in alerts]
    assert [(a.rule, a.target, a.opened_on, a.state, a.cleared_on) for a in after] == key


@pytest.mark.slow
def test_demo_runs_from_a_plain_install_in_a_fresh_virtualenv(tmp_path: Path) -> None:
    """A non-editable install (dependencies borrowed from the test environment so the test
    needs no download) runs `comove demo` outside the checkout."""
    import site
    import venv

    env_dir = tmp_path / "venv"
    venv.EnvBuilder(with_pip=True).create(env_dir)
    python = env_dir / "bin" / "python"
    new_site = Path(subprocess.run(
        [str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
        capture_output=True, text=True, check=True).stdout.strip())
    # A plain path line (not a site dir): the test environment's packages are importable,
    # but its editable hook pointing at the checkout is not run.
    (new_site / "borrowed.pth").write_text("\n".join(site.getsitepackages()) + "\n")
    install = subprocess.run(
        [str(python), "-m", "pip", "install", "--no-deps", "--no-build-isolation", "-q",
         str(REPO)], capture_output=True, text=True, timeout=600)
    assert install.returncode == 0, install.stderr[-3000:]
    where = subprocess.run([str(python), "-c", "import monitor; print(monitor.__file__)"],
                           capture_output=True, text=True, cwd=tmp_path, check=True)
    assert str(new_site) in where.stdout, where.stdout
    run = subprocess.run([str(env_dir / "bin" / "comove"), "demo", "--out", "desk"],
                         capture_output=True, text=True, cwd=tmp_path, timeout=600,
                         env={k: v for k, v in os.environ.items() if k != "PYTHONPATH"})
    assert run.returncode == 0, run.stderr[-3000:]
    assert (tmp_path / "desk" / "pages" / "index.html").is_file()
    assert (tmp_path / "desk" / "digests" / DEMO_END.isoformat() / "digest.html").is_file()
    assert "comove alerts --config" in run.stdout
