"""README.md: the job paragraph first, then the commands; .ci/run runs the same test command."""

from __future__ import annotations

import re
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def _commands() -> list[str]:
    text = (REPO / "README.md").read_text(encoding="utf-8")
    return re.findall(r"^```\n(.+?)\n```$", text, flags=re.S | re.M)


def test_readme_starts_with_one_paragraph_then_the_commands() -> None:
    text = (REPO / "README.md").read_text(encoding="utf-8")
    body = text.split("\n", 1)[1].strip()
    first_paragraph, rest = body.split("\n\n", 1)
    assert "comove" in first_paragraph and len(first_paragraph) > 300
    assert not first_paragraph.startswith(("#", "`"))
    assert "pytest" in _commands()[-1] or any("pytest" in c for c in _commands()[:2])


def test_ci_runs_exactly_the_readme_test_command() -> None:
    test_command = next(c for c in _commands() if "pytest" in c)
    ci = (REPO / ".ci" / "run").read_text(encoding="utf-8")
    assert test_command in ci.splitlines()
