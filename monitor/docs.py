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


SECTIONS = {
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
