"""Settings: defaults, precise errors, nearest-key suggestions, lookup order, documentation."""

from __future__ import annotations

import dataclasses
import tomllib
from pathlib import Path

import pytest

from monitor.config import (
    SECTIONS,
    documented_keys,
    find_settings_file,
    load_settings,
    parse_settings,
    resolve_store_url,
)
from monitor.errors import ConfigError

REPO = Path(__file__).resolve().parents[1]


def test_empty_file_gives_documented_defaults() -> None:
    s = parse_settings({})
    assert (s.returns.kind, s.returns.horizon, s.returns.fill_limit) == ("log", 1, 0)
    assert s.returns.suspect_move == 0.25
    assert s.desk.timezone == "UTC"
    assert s.instruments == ()


@pytest.mark.parametrize(
    ("data", "message"),
    [
        ({"returns": {"knd": "log"}}, "returns.knd: unknown key; did you mean 'kind'?"),
        ({"retruns": {}}, "[retruns]: unknown section; did you mean 'returns'?"),
        ({"returns": {"kind": "logarithmic"}},
         "returns.kind: 'logarithmic' is not one of log, simple"),
        ({"returns": {"horizon": 0}}, "returns.horizon: 0 is not an integer >= 1"),
        ({"returns": {"horizon": "2"}}, "returns.horizon: '2' is not an integer"),
        ({"returns": {"fill_limit": True}}, "returns.fill_limit: True is not an integer"),
        ({"returns": {"suspect_move": -1}}, "returns.suspect_move: -1 is not a number > 0"),
        ({"desk": {"timezone": "Mars/Olympus"}},
         "desk.timezone: 'Mars/Olympus' is not an IANA time zone"),
        ({"instruments": [{"name": "Kelvara"}]}, "instruments[0].symbol: required key is missing"),
        ({"instruments": [{"symbol": "KLV", "grup": "x"}]},
         "instruments[0].grup: unknown key; did you mean 'group'?"),
        ({"instruments": [{"symbol": "KLV"}, {"symbol": "KLV"}]},
         "instruments[1].symbol: 'KLV' is already listed as instruments[0]"),
        ({"instruments": [{"symbol": "K L V"}]}, "instruments[0].symbol: 'K L V' is not 1 to 64"),
        ({"store": "sqlite:///x"}, "store: expected a table"),
        ({"correlation": {"movers_days": 5}},
         "correlation.movers_days: did you mean 'largest_changes_days'? 'movers_days' is its "
         "old name"),
        ({"correlation": {"gauge_days": 21}},
         "correlation.gauge_days: did you mean 'group_average_days'? 'gauge_days' is its old "
         "name"),
    ],
)
def test_errors_name_the_key_path_value_and_expectation(data: dict, message: str) -> None:
    with pytest.raises(ConfigError) as info:
        parse_settings(data)
    assert message in str(info.value)
    assert "\n" not in str(info.value)


def test_relative_sqlite_path_resolves_against_the_settings_folder(tmp_path: Path) -> None:
    (tmp_path / "desk").mkdir()
    path = tmp_path / "desk" / "comove.toml"
    path.write_text('[store]\nurl = "sqlite:///data/store.sqlite"\n')
    settings = load_settings(path)
    assert settings.store_url == f"sqlite:///{tmp_path / 'desk' / 'data' / 'store.sqlite'}"
    assert resolve_store_url("sqlite:////abs/x.sqlite", tmp_path) == "sqlite:////abs/x.sqlite"
    pg = "postgresql://u@h:5432/db"
    assert resolve_store_url(pg, tmp_path) == pg


def test_lookup_order_flag_then_environment_then_working_directory(tmp_path: Path) -> None:
    assert find_settings_file("a.toml", {"COMOVE_CONFIG": "b.toml"}) == Path("a.toml")
    assert find_settings_file(None, {"COMOVE_CONFIG": "b.toml"}) == Path("b.toml")
    assert find_settings_file(None, {}) == Path("comove.toml")


def test_missing_file_and_bad_toml_are_one_line_errors(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="not found"):
        load_settings(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[store\nurl = 1\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_settings(bad)


def test_every_key_is_documented_with_help_text() -> None:
    docs = documented_keys()
    assert docs, "no keys documented"
    for doc in docs:
        assert len(doc.help) > 15, f"{doc.path} has no real help text"
    structured = sum(len(dataclasses.fields(s.cls)) for s in SECTIONS.values() if not s.raw)
    assert len(docs) == structured


def test_example_config_is_valid_and_mentions_every_key() -> None:
    example = REPO / "config" / "comove.example.toml"
    data = tomllib.loads(example.read_text(encoding="utf-8"))
    parse_settings(data, path=example)
    text = example.read_text(encoding="utf-8")
    for name, section in SECTIONS.items():
        if section.raw:
            continue
        for fld in dataclasses.fields(section.cls):
            assert f"{fld.name} =" in text, f"[{name}] {fld.name} missing from the example"
