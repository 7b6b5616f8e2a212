"""Every `comove ...` command quoted to a reader exists: in README.md, DEVELOPERS.md, the
example and demo settings, the templates, and the help texts, messages and comments of the
code. A quoted command, its sub-action (``comove pages build``) and each ``--option`` quoted
with it must be what the argument parser accepts."""

from __future__ import annotations

import argparse
import functools
import importlib
import re
import shlex
from pathlib import Path
from unittest import mock

import pytest

from monitor.cli import BENCHES, build_parser

REPO = Path(__file__).resolve().parents[1]
QUOTED = re.compile(r"`comove( [^`]*)?`")
PLACEHOLDERS = {"NAME", "{name}", "...", "/", "ID", "DATE", "FILE"}


def _sources() -> list[Path]:
    files = [REPO / "README.md", REPO / "DEVELOPERS.md"]
    files += sorted((REPO / "config").glob("*.toml"))
    files += sorted(p for p in (REPO / "templates").rglob("*") if p.is_file())
    files += sorted((REPO / "monitor").rglob("*.py"))
    return files


def _quotes() -> list[tuple[str, str]]:
    found = []
    for path in _sources():
        for match in QUOTED.finditer(path.read_text(encoding="utf-8")):
            found.append((str(path.relative_to(REPO)), match.group(0).strip("`")))
    return found


def _commands(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return dict(action.choices)
    raise AssertionError("the parser has no commands")


def _options(parser: argparse.ArgumentParser) -> set[str]:
    return {option for action in parser._actions for option in action.option_strings}


class _Parsed(Exception):
    pass


@functools.cache
def bench_options(what: str) -> frozenset[str]:
    """The options one benchmark's own parser accepts (`comove bench WHAT --option`): its
    `main` builds the parser, which is caught as it is asked to parse."""
    seen: list[argparse.ArgumentParser] = []

    def caught(self: argparse.ArgumentParser, *args: object, **kwargs: object) -> None:
        seen.append(self)
        raise _Parsed

    module = importlib.import_module(BENCHES[what])
    with mock.patch.object(argparse.ArgumentParser, "parse_args", caught):
        with pytest.raises(_Parsed):
            module.main([])
    return frozenset(_options(seen[0]))


def problems_of(quote: str, parser: argparse.ArgumentParser) -> list[str]:
    """What in one quoted command line the parser would not accept (empty: all of it)."""
    words = shlex.split(quote)[1:]
    if not words:
        return []
    commands = _commands(parser)
    first = words[0]
    if first.startswith("-"):
        return [] if first.split("=")[0] in _options(parser) else [f"no option {first}"]
    if first in PLACEHOLDERS:
        return []
    if first not in commands:
        return [f"no command {first!r}"]
    child = commands[first]
    options = _options(child)
    if first == "bench" and len(words) > 1 and words[1] in BENCHES:
        options |= bench_options(words[1])
    problems = [f"{first} has no option {word.split('=')[0]}" for word in words[1:]
                if word.startswith("--") and word.split("=")[0] not in options]
    choices = [a for a in child._actions if not a.option_strings and a.choices]
    if choices and len(words) > 1 and not words[1].startswith("-"):
        allowed = set(choices[0].choices)
        actions = [w for word in words[1:] if not word.startswith("-")
                   for w in re.split(r"[|/]", word) if w and w not in PLACEHOLDERS]
        # Only the words right after the command name the sub-action ("pages build",
        # "bench ingest|engine", "bench ingest / engine / pages").
        for word in actions:
            if word in allowed:
                continue
            problems.append(f"{first} has no action {word!r} (it has {sorted(allowed)})")
            break
    return problems


def test_the_check_itself_catches_a_command_an_option_and_an_action_that_do_not_exist(
) -> None:
    parser = build_parser()
    assert problems_of("comove config keys", parser) == ["no command 'config'"]
    assert problems_of("comove backfill --fast", parser) == ["backfill has no option --fast"]
    assert problems_of("comove pages publish", parser)[0].startswith(
        "pages has no action 'publish'")
    assert problems_of("comove bench ingest|engine|backfill|digest|pages", parser) == []
    # A benchmark's own options are read from its own parser, and still checked.
    assert problems_of("comove bench backfill --gaps", parser) == []
    assert problems_of("comove bench backfill --gapz", parser) == [
        "bench has no option --gapz"]
    assert problems_of("comove digest --send --resend", parser) == []
    assert problems_of("comove --help", parser) == []


@pytest.mark.parametrize(("where", "quote"), _quotes())
def test_every_quoted_command_exists(where: str, quote: str) -> None:
    assert problems_of(quote, build_parser()) == [], f"{where}: `{quote}`"


def test_the_example_settings_promise_no_defaults_the_help_does_not_list() -> None:
    header = (REPO / "config" / "comove.example.toml").read_text(encoding="utf-8")
    assert "comove --help" not in header
    assert "config keys" not in header
