"""README's reference sections match the code: every command, option and settings key."""

from __future__ import annotations

from pathlib import Path

from monitor.cli import COMMANDS, build_parser
from monitor.config import documented_keys
from monitor.docs import render
from monitor.rules import rule_parameters

README = Path(__file__).resolve().parents[1] / "README.md"


def test_readme_reference_is_what_the_code_generates() -> None:
    text = README.read_text(encoding="utf-8")
    assert render(text) == text, "run: python -m monitor.docs --write README.md"


def test_every_command_option_and_key_appears_in_the_readme() -> None:
    text = README.read_text(encoding="utf-8")
    build_parser()
    for name in COMMANDS:
        assert f"### `comove {name}`" in text
    for doc in documented_keys():
        assert f"`{doc.path}`" in text
    for kind, params in rule_parameters().items():
        assert f'`kind = "{kind}"`' in text
        for param in params:
            assert f"| `{param.name}` |" in text


def test_every_option_has_help_text() -> None:
    import argparse

    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    for name, child in sub.choices.items():
        for action in child._actions:
            if isinstance(action, argparse._HelpAction) or action.help == argparse.SUPPRESS:
                continue
            assert action.help, f"comove {name} {action.option_strings or action.dest}"
