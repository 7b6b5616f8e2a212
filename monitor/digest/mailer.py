"""Sending the digest by SMTP, with retries on temporary failures.

This module owns the SMTP conversation: connection security (STARTTLS, implicit TLS, or
none for a trusted local relay), login, and the retry policy. It never reads the password
from a file: the caller passes it in, or `password_from_environment` reads it from an
explicit mapping such as ``os.environ`` under the variable named in the settings.

Policy
------
* Login happens only on an encrypted connection. Settings with security "none" and a
  username are refused when they are made (`ConfigError`), and `send_message` refuses to
  log in if, against expectation, the connection is not encrypted at login time.
* Connection errors and 4xx replies (the server's "try again later") are retried with
  exponential backoff: ``backoff_seconds * 2 ** (k - 1)`` after the k-th failure.
* 5xx replies (a refused login, a rejected sender or message), certificate failures and
  a server without STARTTLS when it was required are permanent: no retry.
* A failure after the whole message was sent (the final dot) but before the server's
  reply (a dropped connection, a timeout) is "maybe sent": the server may deliver it, so
  it is never retried; the `MailError` has ``maybe_sent`` set and the caller records it.
  A reply to the final dot, even a refusal, settles the question.
* Every failure ends in one `MailError` naming host, port, attempts and the reason. The
  outbox that keeps an unsent digest belongs to the caller.
"""

from __future__ import annotations

import smtplib
import ssl
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from email.message import EmailMessage
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from _typeshed import ReadableBuffer

from monitor._typing import SmtpSecurity
from monitor.errors import ConfigError, MailError

Security = SmtpSecurity
_SECURITY = ("starttls", "tls", "none")


@dataclass(frozen=True)
class SmtpSettings:
    """Where and how to send mail.

    Attributes
    ----------
    host : str
        SMTP server name.
    port : int
        587 is usual for "starttls", 465 for "tls", 25 for a local relay.
    security : {"starttls", "tls", "none"}
        "starttls": plain connection upgraded with STARTTLS before anything else;
        "tls": TLS from the first byte; "none": no encryption, for a relay on the same
        host or network only, and then without login.
    username : str or None
        Login name; None sends without logging in.
    password_env : str or None
        Name of the environment variable holding the password (never the password).
    timeout : float
        Seconds to wait for the server on each network operation.
    """

    host: str
    port: int
    security: Security = "starttls"
    username: str | None = None
    password_env: str | None = None
    timeout: float = 30.0

    def __post_init__(self) -> None:
        if not self.host or any(c.isspace() for c in self.host):
            raise ConfigError(f"smtp.host: {self.host!r} is not a host name")
        if not 0 < self.port < 65536:
            raise ConfigError(f"smtp.port: {self.port!r} is not between 1 and 65535")
        if self.security not in _SECURITY:
            raise ConfigError(
                f"smtp.security: {self.security!r} is not one of starttls, tls, none"
            )
        if not self.timeout > 0:
            raise ConfigError(f"smtp.timeout: {self.timeout!r} is not a positive number")
        if self.security == "none" and self.username:
            raise ConfigError(
                f"smtp.username: {self.username!r} would log in over an unencrypted "
                "connection; use security starttls or tls"
            )


def password_from_environment(
    settings: SmtpSettings, environ: Mapping[str, str]
) -> str | None:
    """Read the SMTP password from `environ` under ``settings.password_env``.

    Returns None when the settings have no username. Raises `ConfigError` naming the
    variable (never its value) when a username is set but the variable is missing.
    """
    if not settings.username:
        return None
    if not settings.password_env:
        raise ConfigError(
            f"smtp.password_env: not set, but smtp.username is {settings.username!r}"
        )
    value = environ.get(settings.password_env)
    if not value:
        raise ConfigError(
            f"smtp.password_env: environment variable {settings.password_env} is not set"
        )
    return value


@dataclass(frozen=True)
class SendResult:
    """Outcome of a successful `send_message`.

    Attributes
    ----------
    attempts : int
        Connections made, including the one that succeeded.
    last_error : str or None
        Reason of the last failed attempt before success; None when the first worked.
    refused : dict
        Recipients the server refused while accepting the others: address ->
        (SMTP code, reply). The message went to everyone else, so it is not retried.
    """

    attempts: int
    last_error: str | None = None
    refused: dict[str, tuple[int, str]] = field(default_factory=dict)


class _Permanent(Exception):
    """A failure that retrying will not mend."""


def _reply_text(reply: bytes | str) -> str:
    text = reply.decode("utf-8", "replace") if isinstance(reply, bytes) else str(reply)
    return " ".join(text.split())


def _describe(error: BaseException) -> tuple[str, bool]:
    """Return (one-line reason, permanent?) for an exception raised while sending."""
    if isinstance(error, _Permanent):
        return str(error), True
    if isinstance(error, smtplib.SMTPRecipientsRefused):
        codes = [code for code, _ in error.recipients.values()]
        detail = "; ".join(
            f"{address}: {code} {_reply_text(reply)}"
            for address, (code, reply) in error.recipients.items()
        )
        return f"all recipients refused ({detail})", any(code >= 500 for code in codes)
    if isinstance(error, smtplib.SMTPResponseException):
        reason = f"{error.smtp_code} {_reply_text(error.smtp_error)}"
        if isinstance(error, smtplib.SMTPAuthenticationError):
            reason = f"login refused: {reason}"
        return reason, not 400 <= error.smtp_code < 500
    if isinstance(error, smtplib.SMTPNotSupportedError):
        return f"server does not support it: {_reply_text(str(error))}", True
    if isinstance(error, smtplib.SMTPServerDisconnected):
        return f"server disconnected: {_reply_text(str(error)) or 'no reason given'}", False
    if isinstance(error, ssl.SSLCertVerificationError):
        return f"certificate not trusted: {_reply_text(error.verify_message or str(error))}", True
    if isinstance(error, OSError):
        # Refused connections, resets, timeouts and TLS handshake failures: the server
        # may be restarting or the network may be down, so another try can succeed.
        return f"{type(error).__name__}: {_reply_text(str(error)) or 'no detail'}", False
    raise error


class _Watch:
    """Knows whether the message data went out whole and its reply is still owed.

    `smtplib.SMTP.data` sends the message ending in CRLF.CRLF with one `send` and then
    reads the reply; a command line never ends that way, so that ending marks the data.
    """

    awaiting_data_reply = False
    maybe_sent = False

    def send(self, s: ReadableBuffer | str) -> None:
        super().send(s)  # type: ignore[misc]
        ending = s[-5:].encode("ascii", "replace") if isinstance(s, str) else bytes(s)[-5:]
        if ending == b"\r\n.\r\n":
            self.awaiting_data_reply = True

    def getreply(self) -> tuple[int, bytes]:
        try:
            reply: tuple[int, bytes] = super().getreply()  # type: ignore[misc]
        except BaseException:
            self.maybe_sent = self.maybe_sent or self.awaiting_data_reply
            raise
        self.awaiting_data_reply = False
        return reply


class _SMTP(_Watch, smtplib.SMTP):
    pass


class _SMTP_SSL(_Watch, smtplib.SMTP_SSL):
    pass


class _MaybeSent(Exception):
    """The final dot went out and no reply came back."""


def _is_encrypted(connection: smtplib.SMTP) -> bool:
    return isinstance(getattr(connection, "sock", None), ssl.SSLSocket)


def _login(connection: smtplib.SMTP, username: str, password: str) -> None:
    # One mechanism only: smtplib's login() tries every offered mechanism in turn after a
    # refusal, which a server may count as several failed logins towards a lockout.
    offered = connection.esmtp_features.get("auth", "").upper().split()
    connection.user, connection.password = username, password
    if "PLAIN" in offered:
        connection.auth("PLAIN", connection.auth_plain)
    elif "LOGIN" in offered:
        connection.auth("LOGIN", connection.auth_login, initial_response_ok=False)
    else:
        connection.login(username, password)


def _attempt(
    msg: EmailMessage,
    settings: SmtpSettings,
    password: str | None,
    context: ssl.SSLContext,
) -> dict[str, tuple[int, str]]:
    connection: _SMTP | _SMTP_SSL
    if settings.security == "tls":
        connection = _SMTP_SSL(
            settings.host, settings.port, timeout=settings.timeout, context=context
        )
    else:
        connection = _SMTP(settings.host, settings.port, timeout=settings.timeout)
    try:
        return _converse(connection, msg, settings, password, context)
    except OSError as error:
        if connection.maybe_sent or connection.awaiting_data_reply:
            reason, _ = _describe(error)
            raise _MaybeSent(f"no reply after the message was sent ({reason})") from error
        raise


def _converse(
    connection: smtplib.SMTP,
    msg: EmailMessage,
    settings: SmtpSettings,
    password: str | None,
    context: ssl.SSLContext,
) -> dict[str, tuple[int, str]]:
    try:
        connection.ehlo()
        if settings.security == "starttls":
            if not connection.has_extn("starttls"):
                raise _Permanent("server does not offer STARTTLS")
            connection.starttls(context=context)
            connection.ehlo()
        if settings.username:
            if not _is_encrypted(connection):
                raise _Permanent("refusing to log in over an unencrypted connection")
            if password is None:
                raise _Permanent(f"no password given for user {settings.username!r}")
            _login(connection, settings.username, password)
        refused = connection.send_message(msg)
    finally:
        # Say goodbye whatever happened; once the message is accepted a lost goodbye
        # changes nothing (it must never turn a delivery into a retry).
        try:
            connection.quit()
        except (OSError, smtplib.SMTPException):
            connection.close()
    return {
        address: (code, _reply_text(reply)) for address, (code, reply) in refused.items()
    }


def send_message(
    msg: EmailMessage,
    settings: SmtpSettings,
    *,
    password: str | None,
    attempts: int = 3,
    backoff_seconds: float = 2.0,
    sleep: Callable[[float], None] = time.sleep,
    ssl_context: ssl.SSLContext | None = None,
) -> SendResult:
    """Send one message, retrying temporary failures with exponential backoff.

    Parameters
    ----------
    msg : EmailMessage
        The message, with From and To set (e.g. from `monitor.digest.build_message`).
    settings : SmtpSettings
        Server, security and login name.
    password : str or None
        The password for ``settings.username``; ignored without a username.
    attempts : int
        Connections to try at most, at least 1.
    backoff_seconds : float
        Wait after the first failure; doubled after each further one.
    sleep : callable
        Called with each wait in seconds (tests pass a recorder).
    ssl_context : ssl.SSLContext, optional
        TLS settings; by default the system's trusted certificates with host name checks.

    Returns
    -------
    SendResult
        Attempts made, the previous failure if any, and recipients refused individually.

    Raises
    ------
    MailError
        A permanent failure, or temporary ones on every attempt; the message names host,
        port, attempts and the last reason.
    ConfigError
        `attempts` below 1 or a negative `backoff_seconds`.
    """
    if attempts < 1:
        raise ConfigError(f"attempts: {attempts!r} is below 1")
    if backoff_seconds < 0:
        raise ConfigError(f"backoff_seconds: {backoff_seconds!r} is negative")
    if settings.username and password is not None and not password.isascii():
        # smtplib encodes AUTH credentials as ASCII and would fail mid-conversation.
        reason = "password has non-ASCII characters, which SMTP login cannot send"
        raise MailError(
            f"mail to {settings.host}:{settings.port} not attempted: {reason}",
            host=settings.host, port=settings.port, attempts=0, reason=reason, permanent=True,
        )
    context = ssl_context or ssl.create_default_context()
    last_error: str | None = None
    for attempt in range(1, attempts + 1):
        try:
            refused = _attempt(msg, settings, password, context)
        except _MaybeSent as error:
            raise MailError(
                f"mail to {settings.host}:{settings.port} may have been sent (attempt "
                f"{attempt}): {error}; not retried, so it is not delivered twice",
                host=settings.host, port=settings.port, attempts=attempt, reason=str(error),
                permanent=True, maybe_sent=True,
            ) from error
        except (OSError, _Permanent) as error:
            # smtplib's exceptions are OSError subclasses, so this catches them too.
            reason, permanent = _describe(error)
            last_error = reason
            if permanent or attempt == attempts:
                kind = "permanent failure" if permanent else "gave up"
                raise MailError(
                    f"mail to {settings.host}:{settings.port} failed ({kind} after "
                    f"{attempt} attempt{'s' if attempt > 1 else ''}): {reason}",
                    host=settings.host, port=settings.port, attempts=attempt,
                    reason=reason, permanent=permanent,
                ) from error
            sleep(backoff_seconds * 2 ** (attempt - 1))
            continue
        return SendResult(attempts=attempt, last_error=last_error, refused=refused)
    raise AssertionError("unreachable: the loop returns or raises")  # pragma: no cover
