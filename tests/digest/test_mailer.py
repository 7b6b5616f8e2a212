"""Sending the digest: a real SMTP server in the test process (aiosmtpd), TLS, login, retries."""

from __future__ import annotations

import datetime as dt
import email
import ipaddress
import re
import socket
import ssl
from collections.abc import Iterator
from dataclasses import dataclass, field
from email.message import EmailMessage
from email.policy import default as default_policy
from pathlib import Path
from typing import Any

import pytest
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import NameOID

from monitor.bench.digest_speed import synthetic_context
from monitor.digest.mailer import (
    MailError,
    SmtpSettings,
    password_from_environment,
    send_message,
)
from monitor.digest.message import build_message
from monitor.digest.render import render_digest
from monitor.digest.rendered import RenderedDigest
from monitor.errors import ConfigError

USER = "digest-bot"
PASSWORD = "kelvara-2026-relay"
HOST = "127.0.0.1"


@dataclass
class Server:
    """What the test server saw."""

    port: int
    messages: list[bytes] = field(default_factory=list)
    auth_tls: list[bool] = field(default_factory=list)
    logins: list[tuple[str, bool]] = field(default_factory=list)
    temporary_failures: int = 0


class _Handler:
    def __init__(self, server: Server) -> None:
        self.server = server

    async def handle_DATA(self, smtp: Any, session: Any, envelope: Any) -> str:
        if self.server.temporary_failures > 0:
            self.server.temporary_failures -= 1
            return "451 4.3.0 Kelvara relay busy, try later"
        self.server.messages.append(envelope.original_content or envelope.content)
        return "250 2.0.0 Accepted"


def _authenticator(server: Server) -> Any:
    def check(smtp: Any, session: Any, envelope: Any, mechanism: str, data: Any) -> AuthResult:
        # The transport wraps an SSL object only once TLS is up (STARTTLS or implicit).
        encrypted = smtp.transport.get_extra_info("ssl_object") is not None
        server.auth_tls.append(encrypted)
        assert isinstance(data, LoginPassword)
        ok = data.login.decode() == USER and data.password.decode() == PASSWORD
        server.logins.append((data.login.decode(), ok))
        # handled=False makes aiosmtpd send its own 535 reply on failure.
        return AuthResult(success=ok, handled=False)

    return check


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind((HOST, 0))
        return int(probe.getsockname()[1])


@pytest.fixture(scope="module")
def certificate(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """A self-signed certificate for localhost / 127.0.0.1, written to a temp folder."""
    folder = tmp_path_factory.mktemp("tls")
    key = ec.generate_private_key(ec.SECP256R1())
    name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "Kelvara test relay")])
    now = dt.datetime.now(dt.UTC)
    cert = (
        x509.CertificateBuilder()
        .subject_name(name)
        .issuer_name(name)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - dt.timedelta(days=1))
        .not_valid_after(now + dt.timedelta(days=2))
        .add_extension(
            x509.SubjectAlternativeName(
                [x509.DNSName("localhost"), x509.IPAddress(ipaddress.ip_address(HOST))]
            ),
            critical=False,
        )
        .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
        .sign(key, hashes.SHA256())
    )
    cert_path, key_path = folder / "relay.pem", folder / "relay.key"
    cert_path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    key_path.write_bytes(
        key.private_bytes(
            serialization.Encoding.PEM,
            serialization.PrivateFormat.PKCS8,
            serialization.NoEncryption(),
        )
    )
    return cert_path, key_path


@pytest.fixture(scope="module")
def server_context(certificate: tuple[Path, Path]) -> ssl.SSLContext:
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(*certificate)
    return context


@pytest.fixture(scope="module")
def client_context(certificate: tuple[Path, Path]) -> ssl.SSLContext:
    return ssl.create_default_context(cafile=str(certificate[0]))


@pytest.fixture
def starttls_server(server_context: ssl.SSLContext) -> Iterator[Server]:
    server = Server(port=_free_port())
    controller = Controller(
        _Handler(server), hostname=HOST, port=server.port,
        tls_context=server_context, require_starttls=True,
        authenticator=_authenticator(server), auth_require_tls=True,
    )
    controller.start()
    try:
        yield server
    finally:
        controller.stop()


@pytest.fixture
def implicit_tls_server(server_context: ssl.SSLContext) -> Iterator[Server]:
    server = Server(port=_free_port())
    # With TLS from the first byte aiosmtpd does not see a STARTTLS upgrade, so its own
    # auth_require_tls check would refuse AUTH; the authenticator records TLS instead.
    controller = Controller(
        _Handler(server), hostname=HOST, port=server.port, ssl_context=server_context,
        authenticator=_authenticator(server), auth_require_tls=False,
    )
    controller.start()
    try:
        yield server
    finally:
        controller.stop()


@pytest.fixture
def plain_server() -> Iterator[Server]:
    server = Server(port=_free_port())
    controller = Controller(_Handler(server), hostname=HOST, port=server.port)
    controller.start()
    try:
        yield server
    finally:
        controller.stop()


@pytest.fixture(scope="module")
def rendered() -> RenderedDigest:
    return render_digest(synthetic_context(instruments=12, groups=2, new_alerts=2))


@pytest.fixture(scope="module")
def message(rendered: RenderedDigest) -> EmailMessage:
    return build_message(
        rendered, sender="digest@kelvara.invalid", recipients=["risk@kelvara.invalid"],
        date=dt.datetime(2026, 3, 5, 18, 31, tzinfo=dt.UTC), message_id_domain="kelvara.invalid",
    )


class SleepRecorder:
    def __init__(self) -> None:
        self.delays: list[float] = []

    def __call__(self, seconds: float) -> None:
        self.delays.append(seconds)


def test_starttls_delivery_keeps_the_mime_structure_and_logs_in_only_after_tls(
    starttls_server: Server, message: EmailMessage, client_context: ssl.SSLContext
) -> None:
    settings = SmtpSettings(HOST, starttls_server.port, "starttls", USER, "COMOVE_SMTP_PASSWORD")
    sleep = SleepRecorder()
    result = send_message(
        message, settings, password=PASSWORD, sleep=sleep, ssl_context=client_context
    )
    assert result.attempts == 1 and result.last_error is None and result.refused == {}
    assert sleep.delays == []
    assert starttls_server.logins == [(USER, True)]
    assert starttls_server.auth_tls == [True]
    assert len(starttls_server.messages) == 1
    received = email.message_from_bytes(starttls_server.messages[0], policy=default_policy)
    assert received.get_content_type() == "multipart/alternative"
    text_part, related = received.get_payload()  # type: ignore[misc]
    assert text_part.get_content_type() == "text/plain"
    assert related.get_content_type() == "multipart/related"
    html_part, *images = related.get_payload()
    assert html_part.get_content_type() == "text/html"
    assert images and all(part.get_content_type() == "image/png" for part in images)
    cids = {part["Content-ID"].strip("<>") for part in images}
    referenced = set(re.findall(r'src="cid:([^"]+)"', html_part.get_content()))
    assert referenced == cids
    assert received["Subject"] == message["Subject"]


def test_implicit_tls_delivery_logs_in_over_tls(
    implicit_tls_server: Server, message: EmailMessage, client_context: ssl.SSLContext
) -> None:
    settings = SmtpSettings(HOST, implicit_tls_server.port, "tls", USER, "COMOVE_SMTP_PASSWORD")
    result = send_message(message, settings, password=PASSWORD, ssl_context=client_context)
    assert result.attempts == 1
    assert implicit_tls_server.auth_tls == [True]
    assert len(implicit_tls_server.messages) == 1


def test_wrong_password_is_a_permanent_mail_error_without_retry(
    starttls_server: Server, message: EmailMessage, client_context: ssl.SSLContext
) -> None:
    settings = SmtpSettings(HOST, starttls_server.port, "starttls", USER, "COMOVE_SMTP_PASSWORD")
    sleep = SleepRecorder()
    with pytest.raises(MailError) as caught:
        send_message(
            message, settings, password="not-it", attempts=3, sleep=sleep,
            ssl_context=client_context,
        )
    error = caught.value
    assert error.permanent and error.attempts == 1
    assert sleep.delays == []
    text = str(error)
    assert "\n" not in text
    assert f"{HOST}:{starttls_server.port}" in text
    assert "login refused: 535" in text
    assert "not-it" not in text
    # One login try in all: no second mechanism, no second connection.
    assert starttls_server.logins == [(USER, False)]
    assert starttls_server.messages == []


def test_server_down_is_retried_with_exponential_backoff_then_fails(
    message: EmailMessage,
) -> None:
    port = _free_port()  # nothing listens there any more
    settings = SmtpSettings(HOST, port, "starttls", timeout=2.0)
    sleep = SleepRecorder()
    with pytest.raises(MailError) as caught:
        send_message(
            message, settings, password=None, attempts=4, backoff_seconds=1.5, sleep=sleep
        )
    assert sleep.delays == [1.5, 3.0, 6.0]
    error = caught.value
    assert error.attempts == 4 and not error.permanent
    assert f"mail to {HOST}:{port} failed (gave up after 4 attempts)" in str(error)
    assert "ConnectionRefusedError" in error.reason


def test_temporary_4xx_reply_is_retried_and_then_delivered(
    starttls_server: Server, message: EmailMessage, client_context: ssl.SSLContext
) -> None:
    starttls_server.temporary_failures = 1
    settings = SmtpSettings(HOST, starttls_server.port, "starttls", USER, "COMOVE_SMTP_PASSWORD")
    sleep = SleepRecorder()
    result = send_message(
        message, settings, password=PASSWORD, sleep=sleep, ssl_context=client_context
    )
    assert result.attempts == 2
    assert result.last_error is not None and result.last_error.startswith("451")
    assert sleep.delays == [2.0]
    assert len(starttls_server.messages) == 1


def test_untrusted_certificate_is_permanent(
    starttls_server: Server, message: EmailMessage
) -> None:
    settings = SmtpSettings(HOST, starttls_server.port, "starttls", USER, "COMOVE_SMTP_PASSWORD")
    sleep = SleepRecorder()
    with pytest.raises(MailError, match="certificate not trusted") as caught:
        # The default context trusts only the system's authorities, not the test relay.
        send_message(message, settings, password=PASSWORD, sleep=sleep)
    assert caught.value.permanent and sleep.delays == []
    assert starttls_server.auth_tls == []


def test_starttls_required_but_not_offered_is_permanent(
    plain_server: Server, message: EmailMessage
) -> None:
    settings = SmtpSettings(HOST, plain_server.port, "starttls", USER, "COMOVE_SMTP_PASSWORD")
    with pytest.raises(MailError, match="server does not offer STARTTLS"):
        send_message(message, settings, password=PASSWORD, sleep=SleepRecorder())
    assert plain_server.messages == []


def test_plain_relay_without_login_delivers(plain_server: Server, message: EmailMessage) -> None:
    result = send_message(message, SmtpSettings(HOST, plain_server.port, "none"), password=None)
    assert result.attempts == 1
    assert len(plain_server.messages) == 1


def test_login_over_an_unencrypted_connection_is_refused_in_the_settings() -> None:
    with pytest.raises(ConfigError, match="smtp.username: 'digest-bot' would log in"):
        SmtpSettings(HOST, 25, "none", USER, "COMOVE_SMTP_PASSWORD")


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"port": 0}, "smtp.port: 0"),
        ({"security": "ssl"}, "smtp.security: 'ssl'"),
        ({"timeout": 0.0}, "smtp.timeout: 0.0"),
        ({"host": "relay kelvara"}, "smtp.host: 'relay kelvara'"),
    ],
)
def test_bad_settings_name_the_key_and_value(kwargs: dict[str, Any], message: str) -> None:
    fields: dict[str, Any] = {"host": HOST, "port": 587, **kwargs}
    with pytest.raises(ConfigError, match=re.escape(message)):
        SmtpSettings(**fields)


def test_bad_retry_arguments_are_refused(message: EmailMessage) -> None:
    settings = SmtpSettings(HOST, 587)
    with pytest.raises(ConfigError, match="attempts: 0"):
        send_message(message, settings, password=None, attempts=0)
    with pytest.raises(ConfigError, match="backoff_seconds: -1"):
        send_message(message, settings, password=None, backoff_seconds=-1)


def test_non_ascii_password_is_refused_before_connecting(message: EmailMessage) -> None:
    # smtplib sends AUTH credentials as ASCII; say so instead of failing mid-conversation.
    settings = SmtpSettings(HOST, _free_port(), "starttls", USER, "COMOVE_SMTP_PASSWORD")
    sleep = SleepRecorder()
    with pytest.raises(MailError, match="password has non-ASCII characters") as caught:
        send_message(message, settings, password="kelvara-\u03a3", sleep=sleep)
    assert caught.value.attempts == 0 and sleep.delays == []
    assert "\u03a3" not in str(caught.value)


def test_password_is_read_from_the_named_variable_only() -> None:
    settings = SmtpSettings(HOST, 587, "starttls", USER, "COMOVE_SMTP_PASSWORD")
    assert password_from_environment(settings, {"COMOVE_SMTP_PASSWORD": PASSWORD}) == PASSWORD
    with pytest.raises(ConfigError, match="COMOVE_SMTP_PASSWORD is not set"):
        password_from_environment(settings, {"OTHER": PASSWORD})
    anonymous = SmtpSettings(HOST, 25, "none")
    assert password_from_environment(anonymous, {}) is None
