"""Writing the history site into a folder so a reader never sees a half-written page.

This module owns `build_site`: files compared with what is on disk and replaced
atomically, charts redrawn only when what they show changed, and the manifest of what
the build wrote (`MANIFEST_NAME`). Rebuilding removes only files that the previous build
wrote, never anything else in the folder, such as the digest archive. It is the only
module of the pages that writes to the disk; times shown are passed in, the clock is
never read.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from monitor.errors import ComoveError
from monitor.pages import svg_charts
from monitor.pages.context import SiteContext
from monitor.pages.paths import check_relative_path
from monitor.pages.render import render_pages

LOG = logging.getLogger("comove.pages")

MANIFEST_NAME = ".comove-pages.json"
"""List of the files the last build wrote; a rebuild removes those it no longer writes."""


@dataclass(frozen=True)
class BuildReport:
    """What `build_site` did.

    Attributes
    ----------
    written : int
        Files written because they were new or their content changed.
    unchanged : int
        Files left alone because their content was already the same.
    removed : int
        Files of the previous build that this build no longer has (stale pages).
    charts_drawn : int
        Charts drawn by this build (the others were unchanged since the last one).
    files : tuple of str
        Every file of the site, relative paths with "/", sorted.
    missing_digests : tuple of str
        Digest paths linked from digests.html that did not exist at build time.
    """

    written: int
    unchanged: int
    removed: int
    charts_drawn: int
    files: tuple[str, ...]
    missing_digests: tuple[str, ...] = ()


def _default_workers() -> int:
    return max(1, min(4, os.cpu_count() or 1))


def _write_if_changed(path: Path, data: bytes) -> bool:
    """Write `data` to `path` unless it already holds exactly that; True when written."""
    try:
        if path.stat().st_size == len(data) and path.read_bytes() == data:
            return False
    except FileNotFoundError:
        pass
    path.parent.mkdir(parents=True, exist_ok=True)
    # Write beside the target and rename over it: a reader sees the old file or the new
    # one, never a partial one (os.replace is atomic within one file system).
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
        os.chmod(temporary, 0o644)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    return True


@dataclass(frozen=True)
class _Manifest:
    """What the previous build recorded: its files, and each chart's cache key and hash."""

    files: tuple[str, ...]
    charts: dict[str, tuple[str, str]]


def _read_manifest(folder: Path) -> _Manifest:
    try:
        recorded = json.loads((folder / MANIFEST_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return _Manifest((), {})
    if not isinstance(recorded, dict):
        return _Manifest((), {})
    files = []
    listed = recorded.get("files", [])
    for item in listed if isinstance(listed, list) else []:
        # A manifest edited by hand must not be able to point outside the site.
        try:
            files.append(check_relative_path("manifest", str(item)))
        except ComoveError:
            continue
    charts: dict[str, tuple[str, str]] = {}
    entries = recorded.get("charts", {})
    for path, entry in (entries.items() if isinstance(entries, dict) else []):
        if isinstance(entry, list) and len(entry) == 2 and all(isinstance(e, str) for e in entry):
            charts[str(path)] = (entry[0], entry[1])
    return _Manifest(tuple(files), charts)


def _sha256_of(path: Path) -> str | None:
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return None


def _inside(folder: Path, path: Path) -> bool:
    resolved = path.resolve()
    return folder in resolved.parents


def build_site(
    ctx: SiteContext, out_dir: Path | str, *, workers: int | None = None
) -> BuildReport:
    """Render the history site and write it into `out_dir`.

    Parameters
    ----------
    ctx : SiteContext
        What to show.
    out_dir : Path or str
        The site's folder, created if missing. Files the previous build wrote and this
        one does not (pages of pairs no longer present, say) are removed; nothing else in
        the folder is touched.
    workers : int, optional
        Processes drawing charts; by default one per CPU, at most 4 (small sites are
        drawn in this process anyway, see `svg_charts.PARALLEL_MINIMUM`).

    Returns
    -------
    BuildReport
        Counts of files written, unchanged and removed, charts drawn, every file of the
        site, and the digest links whose file is not there (yet).

    Raises
    ------
    ComoveError
        `out_dir` exists and is not a folder, or the context is inconsistent (see
        `monitor.pages.render.render_pages`).

    Notes
    -----
    Each file is compared with what is on disk and only rewritten when its bytes differ,
    through a temporary file renamed over the old one, so a reader sees the old page or
    the new one, never a part. A chart is drawn again only when what it is drawn from
    (data, periods, levels, title, the chart code, matplotlib's version) changed since the
    build that wrote it, or its file no longer has the bytes that build wrote: drawing is
    nearly all of a build's time. Files are not fsynced: a crash mid-build is repaired by
    the next build.
    """
    folder = Path(out_dir)
    if folder.exists() and not folder.is_dir():
        raise ComoveError(f"out: {str(folder)!r} exists and is not a folder")
    pages, charts = render_pages(ctx)
    folder.mkdir(parents=True, exist_ok=True)
    folder = folder.resolve()
    with build_lock(folder):
        return _write_site(ctx, folder, pages, charts, workers)


LOCK_NAME = ".comove-pages.lock"
"""The file a build holds locked while it writes the folder (hidden: never served)."""


@contextmanager
def build_lock(folder: Path) -> Iterator[None]:
    """Hold the folder's build lock: a second build of the same folder (the evening run
    and a `comove pages build` at once) waits for the first to finish instead of writing
    the same files and manifest under it. The lock goes with the process holding it, so a
    killed build never leaves the folder locked."""
    import fcntl
    import logging

    with open(folder / LOCK_NAME, "a+b") as handle:
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            logging.getLogger("comove.pages").info(
                "another pages build is writing %s; waiting for it to finish", folder)
            fcntl.flock(handle, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def _write_site(ctx: SiteContext, folder: Path, pages: dict[str, bytes],
                charts: dict[str, svg_charts.HistoryChartRequest], workers: int | None
                ) -> BuildReport:
    previous = _read_manifest(folder)

    written = unchanged = 0
    chart_record: dict[str, tuple[str, str]] = {}
    to_draw: list[str] = []
    for path in sorted(charts):
        key = charts[path].cache_key()
        recorded = previous.charts.get(path)
        on_disk = _sha256_of(folder / path) if recorded and recorded[0] == key else None
        if recorded is not None and on_disk == recorded[1]:
            chart_record[path] = recorded
            unchanged += 1
        else:
            to_draw.append(path)
    LOG.info("pages: %d files, %d charts to draw (%d unchanged)", len(pages), len(to_draw),
             unchanged)

    def progress(done: int, total: int) -> None:
        LOG.info("pages: %d of %d charts drawn", done, total)

    drawn = svg_charts.render_history_charts(
        [charts[p] for p in to_draw], workers=_default_workers() if workers is None else workers,
        progress=progress,
    )
    for path, chart in zip(to_draw, drawn, strict=True):
        chart_record[path] = (charts[path].cache_key(), hashlib.sha256(chart.svg).hexdigest())
        if _write_if_changed(folder / path, chart.svg):
            written += 1
        else:
            unchanged += 1
    for path, data in sorted(pages.items()):
        if _write_if_changed(folder / path, data):
            written += 1
        else:
            unchanged += 1

    every_file = set(pages) | set(charts)
    removed = 0
    for relative in previous.files:
        if relative in every_file:
            continue
        target = folder / relative
        # Never follow a link out of the site, whatever the manifest says.
        if target.is_file() and not target.is_symlink() and _inside(folder, target):
            target.unlink()
            removed += 1
    manifest = {
        "format": 1,
        "files": sorted(every_file),
        "charts": {path: list(chart_record[path]) for path in sorted(chart_record)},
    }
    _write_if_changed(
        folder / MANIFEST_NAME, (json.dumps(manifest, indent=0) + "\n").encode("utf-8")
    )
    missing = tuple(d.path for d in ctx.digests if not (folder / d.path).is_file())
    return BuildReport(
        written=written, unchanged=unchanged, removed=removed, charts_drawn=len(to_draw),
        files=tuple(sorted(every_file)), missing_digests=missing,
    )


__all__ = ["LOCK_NAME", "MANIFEST_NAME", "BuildReport", "build_lock", "build_site"]
