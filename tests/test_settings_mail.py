"""Mail settings that could leak or mislead: a password typed into `password_env` is never
repeated in a message, and a line break in `sender` is named as the sender's fault."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from monitor.config import load_settings
from monitor.digest.message import build_message
from monitor.errors import ConfigError


def _load(tmp_path: Path, digest: str) -> None:
    path = tmp_path / "comove.toml"
    path.write_text(f"[digest]\n{digest}\n", encoding="utf-8")
    load_settings(path)


def test_a_password_typed_into_password_env_is_not_echoed(tmp_path: Path) -> None:
    with pytest.raises(ConfigError) as info:
        _load(tmp_path, 'username = "desk"\npassword_env = "Tr0ub4dor&3 horse"')
    message = str(info.value)
    assert "Tr0ub4dor" not in message and "horse" not in message
    assert message.startswith("digest.password_env: the value given is not the name of an "
                              "environment variable")


def test_a_valid_variable_name_is_accepted(tmp_path: Path) -> None:
    _load(tmp_path, 'username = "desk"\npassword_env = "COMOVE_SMTP_PASSWORD"')


@pytest.mark.parametrize(("digest", "key"), [
    ('sender = "comove@halden.example\\r\\nBcc: all@halden.example"', "digest.sender"),
    ('recipients = ["risk@halden.example", "x@halden.example\\nBcc: y@halden.example"]',
     "digest.recipients"),
])
def test_a_line_break_in_an_address_names_the_key_it_is_in(
    tmp_path: Path, digest: str, key: str
) -> None:
    with pytest.raises(ConfigError, match=rf"^{key}: .* single-line address"):
        _load(tmp_path, digest)


def test_the_message_builder_names_the_sender_too() -> None:
    from monitor.digest.render import RenderedDigest

    rendered = RenderedDigest.__new__(RenderedDigest)  # never reached: the check comes first
    with pytest.raises(ConfigError, match=r"^sender: 'a@halden.example\\r\\nBcc: b' is not"):
        build_message(rendered, sender="a@halden.example\r\nBcc: b",
                      recipients=["risk@halden.example"],
                      date=dt.datetime(2026, 3, 5, 18, 30, tzinfo=dt.UTC))
