"""Rendering the history site: every page of a `SiteContext`, in memory.

This module owns the renderer that turns one context into the site's files (path ->
bytes) and the chart requests of its pages (`render_pages`), and `render_site`, which
draws the charts too. It is pure apart from Jinja and matplotlib: it never reads the
store, the clock or the disk beyond the shipped templates; `monitor.pages.write` writes.

Decisions a reader of the code should know:

- Every alert links to a page that exists: an alert whose pair, target or rule has no page
  in the context gets a short page built from the alert alone, saying so.
- Each file has one owner: two pages (or a page and a chart) that would share a file name
  are refused rather than overwriting each other.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Sequence
from pathlib import PurePosixPath
from typing import Any

import jinja2

from monitor.cautions import cautions
from monitor.errors import ComoveError
from monitor.pages import svg_charts
from monitor.pages.context import (
    ALERT_STATES,
    SEVERITIES,
    STATE_LABELS,
    AckView,
    AlertSpan,
    DriversView,
    EventView,
    InstrumentView,
    MeasureHistory,
    RulePage,
    SiteContext,
)
from monitor.pages.paths import (
    SITE_ASSETS,
    alert_anchor,
    pair_page_path,
    rule_page_path,
    target_page_path,
)
from monitor.pages.views import (
    SCREENFUL,
    AlertRow,
    HistoryPageView,
    alert_order,
    alert_row,
    event_order,
    flood_days,
    id_order,
    measure_block,
)
from monitor.pages.words import EVENT_WORDS, format_count, format_duration, sort_number
from monitor.templating import make_environment, templates_dir


def environment() -> jinja2.Environment:
    """The shared Jinja environment plus the pages' own filters."""
    shared = make_environment()
    shared.filters["duration"] = format_duration
    shared.filters["count"] = format_count
    shared.filters["sortnum"] = sort_number
    shared.filters["anchor"] = alert_anchor
    return shared


class _SiteRenderer:
    """Turns one `SiteContext` into the site's files (path -> bytes)."""

    def __init__(self, ctx: SiteContext) -> None:
        self.ctx = ctx
        self.environment = environment()
        self.cautions = cautions(ctx.parameters.confidence_level, where="pages")
        self.files: dict[str, bytes] = {}
        self.charts: dict[str, svg_charts.HistoryChartRequest] = {}
        self.owners: dict[str, str] = {}
        self.names: dict[str, str] = {}
        for page in ctx.pairs:
            for item in (page.a, page.b):
                if item.name:
                    self.names.setdefault(item.symbol, item.name)
        for target in ctx.targets:
            if target.name:
                self.names.setdefault(target.label, target.name)
        self.rows = [
            alert_row(a, ctx.groups, self.names)
            for a in sorted(ctx.alerts, key=alert_order)
        ]
        self.group_names = sorted(
            (set(ctx.groups.values()) | {g for row in self.rows for g in row.groups}) - {""}
        )
        self.floods = flood_days(self.rows)
        # The last configuration of a rule name wins, as on the rule pages.
        self.method_notes = {rule.name: rule.method_note for rule in ctx.rules
                             if rule.method_note}

    # Each path may come from one thing only; a clash would mean two pages share a file.
    def _claim(self, path: str, owner: str) -> None:
        previous = self.owners.setdefault(path, owner)
        if previous != owner:
            raise ComoveError(f"pages: {owner} and {previous} would both be written to {path}")

    def _add(self, path: str, owner: str, data: bytes) -> None:
        self._claim(path, owner)
        self.files[path] = data

    def render(self, name: str, root: str, current: str, **values: Any) -> bytes:
        template = self.environment.get_template(f"pages/{name}")
        text = template.render(
            ctx=self.ctx, root=root, current=current, cautions=self.cautions,
            severities=SEVERITIES, states=ALERT_STATES, state_labels=STATE_LABELS,
            event_words=EVENT_WORDS,
            chart_key=svg_charts.HISTORY_CHART_KEY, rule_path=rule_page_path, **values,
        )
        return text.encode("utf-8")

    def build(self) -> tuple[dict[str, bytes], dict[str, svg_charts.HistoryChartRequest]]:
        """Render every page; charts are returned as requests, drawn by the caller."""
        ctx = self.ctx
        pages_dir = templates_dir() / "pages"
        for asset in SITE_ASSETS:
            self._add(asset, f"asset {asset}", (pages_dir / asset).read_bytes())
        self._add("index.html", "index", self.render(
            "index.html", "", "alerts", rows=self.rows, group_names=self.group_names,
            rule_names=sorted({row.alert.rule_name for row in self.rows}), floods=self.floods,
            screenful=SCREENFUL, mutes=[m for m in ctx.mutes if m.state != "ended"],
            ended_mutes=sum(m.state == "ended" for m in ctx.mutes),
        ))
        self._rule_pages()
        self._history_pages()
        runs = sorted(ctx.runs, key=lambda r: (r.started, id_order(r.id)), reverse=True)
        self._add("runs.html", "runs", self.render("runs.html", "", "runs", runs=runs))
        digests = sorted(ctx.digests, key=lambda d: (d.as_of, d.path), reverse=True)
        self._add("digests.html", "digests",
                  self.render("digests.html", "", "digests", digests=digests))
        return self.files, self.charts

    def _rule_pages(self) -> None:
        by_rule: dict[str, list[AlertRow]] = defaultdict(list)
        for row in self.rows:
            by_rule[row.alert.rule_name].append(row)
        rules = list(self.ctx.rules)
        seen: set[str] = set()
        for rule in rules:
            if rule.name in seen:
                raise ComoveError(f"rules: {rule.name!r} appears twice")
            seen.add(rule.name)
        # Alerts of a rule no longer configured still need a page to link to.
        retired = [
            RulePage(name=name, kind=rows[0].alert.rule_kind, severity=rows[0].alert.severity,
                     measure=rows[0].alert.measure)
            for name, rows in sorted(by_rule.items()) if name not in seen
        ]
        entries = [(rule, True) for rule in rules] + [(rule, False) for rule in retired]
        self._add("rules.html", "rules", self.render(
            "rules.html", "", "rules",
            entries=[(rule, known, by_rule.get(rule.name, [])) for rule, known in entries],
        ))
        for rule, configured in entries:
            self._add(rule_page_path(rule.name), f"rule {rule.name!r}", self.render(
                "rule.html", "../", "rules", rule=rule, configured=configured,
                rows=by_rule.get(rule.name, []),
                floods=[f for f in self.floods if f.rule_name == rule.name],
            ))

    def _history_pages(self) -> None:
        by_target: dict[str, list[AlertRow]] = defaultdict(list)
        for row in self.rows:
            by_target[row.link].append(row)
        built: set[str] = set()
        for page in self.ctx.pairs:
            path = pair_page_path(page.a.symbol, page.b.symbol)
            if path in built:
                raise ComoveError(f"pairs: {page.label!r} appears twice")
            built.add(path)
            self._history_page(
                path=path, kind="pair", title=page.label,
                heading=f"{page.a.symbol} and {page.b.symbol}",
                instruments=(page.a, page.b), members=(), note=page.note,
                measures=page.measures, spans=page.spans, events=page.events,
                acknowledgements=page.acknowledgements, drivers=page.drivers,
                rows=by_target.get(path, []), symbols=(page.a.symbol, page.b.symbol),
            )
        for target in self.ctx.targets:
            path = target_page_path(target.kind, target.label)
            if path in built:
                raise ComoveError(f"targets: {target.kind} {target.label!r} appears twice")
            built.add(path)
            self._history_page(
                path=path, kind=target.kind, title=target.label,
                heading=f"{'Group' if target.kind == 'group' else 'Instrument'} "
                        f"{target.label}",
                instruments=(), members=tuple(target.members), note=target.name,
                measures=target.measures, spans=target.spans, events=target.events,
                acknowledgements=target.acknowledgements, drivers=(),
                rows=by_target.get(path, []), symbols=None,
            )
        # Alerts whose target has no page in the context: a short page from the alerts.
        for path, rows in sorted(by_target.items()):
            if path in built:
                continue
            alert = rows[0].alert
            if alert.target_kind == "pair":
                a, b = alert.target
                instruments = tuple(
                    InstrumentView(s, self.names.get(s, ""), self.ctx.groups.get(s, ""))
                    for s in (a, b)
                )
                heading, symbols = f"{a} and {b}", (a, b)
            else:
                instruments = ()
                word = "Group" if alert.target_kind == "group" else "Instrument"
                heading, symbols = f"{word} {alert.target[0]}", None
            self._history_page(
                path=path, kind=alert.target_kind, title=alert.target_label, heading=heading,
                instruments=instruments, members=(),
                note="No history was supplied for this target: only its alerts are listed.",
                measures=(), spans=(), events=(), acknowledgements=(), drivers=(),
                rows=rows, symbols=symbols,
            )

    def _history_page(
        self, *, path: str, kind: str, title: str, heading: str,
        instruments: tuple[InstrumentView, ...], members: tuple[str, ...], note: str,
        measures: Sequence[MeasureHistory], spans: Sequence[AlertSpan],
        events: Sequence[EventView], acknowledgements: Sequence[AckView],
        drivers: Sequence[DriversView], rows: list[AlertRow],
        symbols: tuple[str, str] | None,
    ) -> None:
        owner = f"{kind} {title!r}"
        self._claim(path, owner)
        stem = PurePosixPath(path).stem
        folder = str(PurePosixPath(path).parent)
        blocks = []
        for k, history in enumerate(measures, start=1):
            chart_file = f"{stem}-{k}.svg"
            block, request = measure_block(
                history, spans, chart_file, title, self.ctx.parameters.confidence_level
            )
            self._claim(f"{folder}/{chart_file}", owner)
            self.charts[f"{folder}/{chart_file}"] = request
            blocks.append(block)
        view = HistoryPageView(
            path=path, kind=kind, title=title, heading=heading, instruments=instruments,
            members=members, note=note, blocks=tuple(blocks), alerts=tuple(rows),
            spans=tuple(sorted(spans, key=lambda s: (s.start, id_order(s.alert_id)))),
            events=tuple(sorted(events, key=event_order)),
            acknowledgements=tuple(sorted(acknowledgements,
                                          key=lambda a: (a.at, id_order(a.alert_id)))),
            drivers=tuple(sorted(drivers, key=lambda d: (d.day, id_order(d.alert_id)))),
            symbols=symbols, alert_ids=frozenset(str(row.alert.id) for row in rows),
        )
        notes = [(name, self.method_notes[name])
                 for name in dict.fromkeys(row.alert.rule_name for row in rows)
                 if name in self.method_notes]
        rule_names = {row.alert.rule_name for row in rows}
        mutes = [m for m in self.ctx.mutes
                 if m.target == title or (m.rule is not None and m.rule in rule_names)]
        self._add(path, owner, self.render("history.html", "../", "alerts", page=view,
                                           method_notes=notes, mutes=mutes))


def render_site(ctx: SiteContext, *, workers: int = 1) -> dict[str, bytes]:
    """Render every file of the site in memory.

    Parameters
    ----------
    ctx : SiteContext
        What to show.
    workers : int
        Processes drawing the charts (see `svg_charts.render_history_charts`).

    Returns
    -------
    dict of str to bytes
        Site-relative path ("pairs/klv-...html", "/" separators) -> file content.

    Raises
    ------
    ComoveError
        A pair, target or rule appears twice, or two things would share a file name.
    """
    files, charts = render_pages(ctx)
    paths = sorted(charts)
    drawn = svg_charts.render_history_charts([charts[p] for p in paths], workers=workers)
    files.update({path: chart.svg for path, chart in zip(paths, drawn, strict=True)})
    return files


def render_pages(
    ctx: SiteContext,
) -> tuple[dict[str, bytes], dict[str, svg_charts.HistoryChartRequest]]:
    """Render every page of the site in memory, leaving the charts undrawn.

    Parameters
    ----------
    ctx : SiteContext
        What to show.

    Returns
    -------
    pages : dict of str to bytes
        Site-relative path ("/" separators) -> content, for pages and the shipped assets.
    charts : dict of str to svg_charts.HistoryChartRequest
        Site-relative path of each chart -> what to draw there.

    Raises
    ------
    ComoveError
        A pair, target or rule appears twice, or two things would share a file name.
    """
    return _SiteRenderer(ctx).build()


__all__ = ["environment", "render_pages", "render_site"]
