"""A connection that drops after the final dot: the server has the message and may deliver
it, so the digest is recorded as "maybe sent" and never sent again without --resend."""

from __future__ import annotations

import socket
import socketserver
import threading
from collections.abc import Callable, Iterator
from email.message import EmailMessage
from pathlib import Path

import pytest

from monitor.config import Settings
from monitor.demo.synthetic import generate
from monitor.digest import MailError, SmtpSettings, send_message
from monitor.pipeline import ingest_file, init_store, send_digest
from storage import Store
from storage import outbox as outbox_store
from tests.scenarios import END, INSTRUMENTS, RULES, break_scenario


class _Conversation(socketserver.StreamRequestHandler):
    """Just enough SMTP: greets, accepts every command, reads the data, then per the
    server's `after_dot`: 'drop' closes without a reply, '250' accepts, '451' refuses."""

    server: _Server

    def handle(self) -> None:
        self.wfile.write(b"220 relay.halden.example ready\r\n")
        while True:
            line = self.rfile.readline()
            if not line:
                return
            verb = line.strip().split(b" ")[0].upper()
            if verb in (b"EHLO", b"HELO"):
                self.wfile.write(b"250 relay.halden.example\r\n")
            elif verb == b"DATA":
                self.wfile.write(b"354 go ahead\r\n")
                data = bytearray()
                while not data.endswith(b"\r\n.\r\n"):
                    chunk = self.rfile.readline()
                    if not chunk:
                        return
                    data += chunk
                self.server.received.append(bytes(data))
                mode = self.server.after_dot.pop(0) if self.server.after_dot else "250"
                if mode == "drop":
                    self.connection.shutdown(socket.SHUT_RDWR)
                    return
                self.wfile.write(b"250 2.0.0 queued\r\n" if mode == "250"
                                 else b"451 4.3.0 try again later\r\n")
            elif verb == b"QUIT":
                self.wfile.write(b"221 bye\r\n")
                return
            else:
                self.wfile.write(b"250 ok\r\n")


class _Server(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True

    def __init__(self) -> None:
        super().__init__(("127.0.0.1", 0), _Conversation)
        self.received: list[bytes] = []
        self.after_dot: list[str] = []

    @property
    def port(self) -> int:
        return int(self.server_address[1])


@pytest.fixture
def relay() -> Iterator[_Server]:
    server = _Server()
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield server
    server.shutdown()
    server.server_close()


def _message() -> EmailMessage:
    msg = EmailMessage()
    msg["From"] = "comove@halden.example"
    msg["To"] = "risk@halden.example"
    msg["Subject"] = "Halden digest"
    msg.set_content("one line\n.a line starting with a dot\n")
    return msg


def test_a_drop_after_the_final_dot_is_maybe_sent_and_not_retried(relay: _Server) -> None:
    relay.after_dot = ["drop"]
    waits: list[float] = []
    with pytest.raises(MailError) as caught:
        send_message(_message(), SmtpSettings("127.0.0.1", relay.port, security="none"),
                     password=None, attempts=4, backoff_seconds=0.01, sleep=waits.append)
    assert caught.value.maybe_sent and caught.value.attempts == 1
    assert "may have been sent" in str(caught.value)
    assert len(relay.received) == 1 and waits == []  # one delivery, no retry


def test_a_reply_to_the_final_dot_settles_it(relay: _Server) -> None:
    # A 451 after the dot is a clear "not taken": retried, then delivered once.
    relay.after_dot = ["451", "250"]
    result = send_message(_message(), SmtpSettings("127.0.0.1", relay.port, security="none"),
                          password=None, attempts=3, backoff_seconds=0.0, sleep=lambda s: None)
    assert result.attempts == 2 and len(relay.received) == 2


@pytest.fixture
def desk(tmp_path: Path, write_settings: Callable[..., Settings],
         relay: _Server) -> Iterator[tuple[Store, Settings]]:
    digest = (f'\n[digest]\nrecipients = ["risk@halden.example"]\n'
              f'sender = "comove@halden.example"\nsmtp_host = "127.0.0.1"\n'
              f'smtp_port = {relay.port}\nsecurity = "none"\nattempts = 4\n'
              'backoff_seconds = 0.01\n')
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}",
                              INSTRUMENTS + RULES + digest)
    store = init_store(settings)
    closes = generate(break_scenario()).closes.iloc[-200:]
    closes.index.name = "date"
    path = tmp_path / "history.csv"
    closes.to_csv(path, date_format="%Y-%m-%d")
    ingest_file(store, settings, path)
    yield store, settings
    store.dispose()


def test_a_maybe_sent_digest_is_recorded_and_sent_again_only_with_resend(
    desk: tuple[Store, Settings], relay: _Server
) -> None:
    store, settings = desk
    day = END  # the last close of the scenario
    relay.after_dot = ["drop"]
    first = send_digest(store, settings, day, environ={}, sleep=lambda s: None)
    assert first.status == "maybe sent" and "may have been sent" in first.error
    with store.connect() as conn:
        rows = outbox_store.for_date(conn, day)
        assert [r.status for r in rows] == ["maybe sent"]
        assert outbox_store.unsent(conn) == []
    again = send_digest(store, settings, day, environ={}, sleep=lambda s: None)
    assert again.status == "maybe sent" and len(relay.received) == 1
    forced = send_digest(store, settings, day, resend=True, environ={}, sleep=lambda s: None)
    assert forced.status == "sent" and len(relay.received) == 2
