"""The README's reference sections, generated from the code so they cannot drift.

`python -m monitor.docs --write README.md` rewrites the text between the markers
`<!-- reference:NAME -->` and `<!-- /reference:NAME -->`; tests/test_docs.py fails when
the README differs from what this module generates (a command, option or key was added,
renamed or re-described without the README following).
"""

from __future__ import annotations

import argparse
import functools
import re
from pathlib import Path

from monitor.cli import COMMANDS, build_parser
from monitor.config import documented_keys
from monitor.rules import rule_parameters
from monitor.rules.registry import RULE_KINDS


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def commands_reference() -> str:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    lines: list[str] = [
        "Global options, accepted before or after the command: `--config PATH` (settings "
        "file; default `$COMOVE_CONFIG`, else `./comove.toml`), `-q` / `--quiet` (results "
        "and warnings only), `-v` / `--verbose` (also debugging detail); `--version`.", ""]
    globals_ = {"config", "quiet", "verbose"}
    for name, cmd in COMMANDS.items():
        child = sub.choices[name]
        usage = " ".join(child.format_usage().split())
        usage = usage.removeprefix("usage: ")
        lines += [f"### `comove {name}`", "", cmd.help, "", "```", usage, "```", ""]
        rows = []
        for action in child._actions:
            if action.help == argparse.SUPPRESS or isinstance(action, argparse._HelpAction):
                continue
            if action.dest in globals_:
                continue
            flags = ", ".join(action.option_strings) or action.metavar or action.dest
            rows.append(f"| `{_cell(str(flags))}` | {_cell(action.help or '')} |")
        if rows:
            lines += ["| argument | meaning |", "| --- | --- |", *rows, ""]
    return "\n".join(lines).rstrip() + "\n"


def settings_reference() -> str:
    from monitor.calendar import SCHEDULE_KEYS

    lines = ["| key | type | default | meaning |", "| --- | --- | --- | --- |"]
    for doc in documented_keys():
        lines.append(f"| `{doc.path}` | {_cell(doc.type)} | `{_cell(doc.default)}` | "
                     f"{_cell(doc.help)} |")
    for key, (default, help_text) in SCHEDULE_KEYS.items():
        lines.append(f"| `[schedule] {key}` | | `{_cell(repr(default))}` | {_cell(help_text)} |")
    return "\n".join(lines) + "\n"


def rules_reference() -> str:
    lines: list[str] = []
    for kind, params in rule_parameters().items():
        lines += [f"#### `kind = \"{kind}\"`", "", RULE_KINDS[kind].summary, "",
                  "| key | type | default | meaning |", "| --- | --- | --- | --- |"]
        for p in params:
            default = "(required)" if p.required else ("" if p.default is None
                                                      else f"`{p.default!r}`")
            kind_text = p.type_label + (f" ({' / '.join(p.choices)})" if p.choices else "")
            lines.append(f"| `{p.name}` | {_cell(kind_text)} | {default} | {_cell(p.help)} |")
        lines.append("")
    return "\n".join(lines).rstrip() + "\n"


def returns_method() -> str:
    """README Methods: how closes become returns and which dates a pair uses."""
    from monitor.data.returns import DEFAULT_MAX_GAP

    return f"""\
- **Returns, not prices.** Correlations are computed on returns (`log` or `simple`,
  `returns.kind`); two independent random walks often show a large correlation in price
  levels (Yule 1926; Granger & Newbold 1974). A missing close never becomes a zero return
  (unless `returns.fill_limit` carries the last close forward a few days).
- **Each instrument from its own previous close.** A return runs from the instrument's
  own previous close, across the days its market was shut, as long as that close is at
  most `returns.max_gap` business days back (default {DEFAULT_MAX_GAP}; further back the
  return is missing). So an instrument's returns are the same whichever other
  instruments are loaded: a desk holding a future that trades on an equity market's
  holidays does not take any return away from the equity pairs.
- **Each pair on its own dates.** A pair uses the dates on which both of its instruments
  have a return, and a window of W is W of those dates; on a date one side has no return
  the pair keeps its last value. The rules, `comove series`, the digest and the pages all
  compute a pair this way, so they show the same number on every date (a test checks it
  on a panel of several calendars). The trade-off: after a holiday on one side, that
  side's return spans two or more days while the other side's covers one (the other side's
  return of the holiday itself is not used by the pair). Every close and the move over the
  closure are kept, but the longer return carries a day the other side does not, which
  pulls the window's correlation towards zero by about r / (2n) for each such date in a
  window of n (0.007 at r = 0.9, n = 63; checked by simulation in
  tests/engine/test_pairdates.py). Closes taken at different times of day are a separate
  matter: `returns.horizon` (multi-day returns) lessens that bias.
- **Standardised returns on own dates.** The volatility scaling of the statistical rules
  runs over each instrument's own returns (days without a return are skipped, not
  counted), so it too is the same in any panel.
"""


SECTIONS = {
    "returns": returns_method,
    "commands": commands_reference,
    "settings": settings_reference,
    "rules": rules_reference,
}


def _fill(match: re.Match[str], body: str) -> str:
    return match.group(1) + body + match.group(2)


def render(readme: str) -> str:
    """The README with every reference section regenerated."""
    for name, make in SECTIONS.items():
        pattern = re.compile(
            rf"(<!-- reference:{name} -->\n).*?(<!-- /reference:{name} -->)", re.S)
        if not pattern.search(readme):
            raise SystemExit(f"README has no <!-- reference:{name} --> section")
        readme = pattern.sub(functools.partial(_fill, body=make()), readme)
    return readme


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m monitor.docs", description=__doc__)
    parser.add_argument("--write", type=Path, metavar="README", help="rewrite this file")
    args = parser.parse_args(argv)
    if args.write:
        args.write.write_text(render(args.write.read_text(encoding="utf-8")), encoding="utf-8")
        return 0
    for make in SECTIONS.values():
        print(make())
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
