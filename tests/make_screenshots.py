"""Regenerate the README's pictures: the demo's latest digest and the KLV/DUNQ pair page.

    .venv/bin/python tests/make_screenshots.py [--demo DIR]

Runs `comove demo` into DIR (default: a temporary folder), then opens the pages in
Debian's headless chromium through Playwright, the same tooling as the browser tests,
and writes tests/screenshots/digest.png and tests/screenshots/pair-page.png.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

from monitor.demo.run import DEMO_END, run_demo
from monitor.pages.paths import pair_page_path

HERE = Path(__file__).resolve().parent
CHROMIUM_ARGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
    "--disable-component-update", "--no-first-run", "--disable-quic", "--disable-sync",
]


def shoot(demo: Path, out: Path) -> list[Path]:
    from playwright.sync_api import sync_playwright

    digest_day = DEMO_END.replace(day=19)  # the evening the second hedge alert opened
    targets = {
        "digest.png": demo / "digests" / digest_day.isoformat() / "digest.html",
        "pair-page.png": demo / "pages" / pair_page_path("KLV", "DUNQ"),
    }
    out.mkdir(parents=True, exist_ok=True)
    written = []
    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path="/usr/bin/chromium",
                                             args=CHROMIUM_ARGS)
        page = browser.new_page(viewport={"width": 1100, "height": 1500})
        for name, source in targets.items():
            page.goto(source.as_uri())
            page.wait_for_load_state("load")
            path = out / name
            page.screenshot(path=str(path), full_page=False)
            written.append(path)
        browser.close()
    return written


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--demo", type=Path, help="demo folder to build into (kept)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="comove-shots-") as tmp:
        demo = args.demo or Path(tmp) / "demo"
        run_demo(demo)
        for path in shoot(demo, HERE / "screenshots"):
            print(path)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
