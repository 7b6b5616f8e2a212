"""The pages under concurrency: the server answers 200 clients at once on loopback, closes
idle connections after the timeout instead of holding a thread, logs a client leaving
mid-answer at debug level; a second pages build waits for the first (a lock)."""

from __future__ import annotations

import http.client
import logging
import socket
import struct
import threading
import time
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from pathlib import Path

import pytest

from monitor.pages.serve import make_server


@pytest.fixture
def site(tmp_path: Path) -> Path:
    folder = tmp_path / "site"
    (folder / "pairs").mkdir(parents=True)
    (folder / "index.html").write_text("<!doctype html><title>Halden</title><p>index</p>")
    (folder / "pairs" / "klv-dunq.html").write_text("<p>" + "KLV/DUNQ " * 2000 + "</p>")
    (folder / "big.csv").write_bytes(b"date,value\n" + b"2026-01-02,0.5\n" * 400_000)
    return folder


@contextmanager
def _serving(folder: Path, **options: float) -> Iterator[tuple[str, int, object]]:
    server = make_server(folder, **options)  # type: ignore[arg-type]
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    host, port = server.server_address[:2]
    try:
        yield str(host), int(port), server
    finally:
        server.shutdown()
        server.server_close()


def _get(host: str, port: int, path: str, timeout: float = 5.0) -> tuple[int, int]:
    connection = http.client.HTTPConnection(host, port, timeout=timeout)
    try:
        connection.request("GET", path)
        response = connection.getresponse()
        return response.status, len(response.read())
    finally:
        connection.close()


@pytest.mark.slow
def test_two_hundred_clients_at_once_are_all_answered(site: Path) -> None:
    with _serving(site) as (host, port, _):
        start = threading.Barrier(200)

        def client(k: int) -> tuple[int, int]:
            start.wait()
            return _get(host, port, "/pairs/klv-dunq.html" if k % 2 else "/")

        begun = time.monotonic()
        with ThreadPoolExecutor(max_workers=200) as pool:
            results = list(pool.map(client, range(200)))
        took = time.monotonic() - begun
        assert [status for status, _ in results] == [200] * 200, took
        assert all(size > 0 for _, size in results)


def test_an_idle_connection_is_closed_and_does_not_hold_a_worker(site: Path) -> None:
    with _serving(site, workers=2, timeout=0.5) as (host, port, server):
        idle = [socket.create_connection((host, port)) for _ in range(2)]
        try:
            # Both workers are taken by silent clients; after the timeout they are freed.
            begun = time.monotonic()
            assert _get(host, port, "/", timeout=10)[0] == 200
            assert time.monotonic() - begun < 5
            for sock in idle:
                sock.settimeout(5)
                assert sock.recv(100) == b""  # closed by the server
        finally:
            for sock in idle:
                sock.close()
        assert len(server._pool._threads) <= 2  # type: ignore[attr-defined]


def test_a_client_leaving_mid_answer_is_a_debug_line_not_a_traceback(
    site: Path, capfd: pytest.CaptureFixture[str], caplog: pytest.LogCaptureFixture,
    monkeypatch: pytest.MonkeyPatch
) -> None:
    # Only pytest's capture: the command line may have left its own handlers on "comove".
    comove = logging.getLogger("comove")
    monkeypatch.setattr(comove, "handlers", [])
    monkeypatch.setattr(comove, "propagate", True)
    caplog.set_level(logging.DEBUG, logger="comove.pages")
    with _serving(site) as (host, port, _):
        for _ in range(5):
            sock = socket.create_connection((host, port))
            sock.sendall(b"GET /big.csv HTTP/1.0\r\nHost: x\r\n\r\n")
            sock.recv(10)
            # Close with a reset (linger 0) while the server is still writing 6 MB.
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
            sock.close()
        time.sleep(0.5)
        assert _get(host, port, "/", timeout=30)[0] == 200  # still serving
    captured = capfd.readouterr()
    assert "Traceback" not in captured.err, captured.err
    ours = [r for r in caplog.records if r.name == "comove.pages" and "pages:" in r.getMessage()]
    assert any("went away" in r.getMessage() for r in ours), ours
    assert all(r.levelno == logging.DEBUG for r in ours), [r.getMessage() for r in ours]


def test_a_second_pages_build_waits_for_the_first_instead_of_writing_under_it(
    tmp_path: Path, caplog: pytest.LogCaptureFixture, monkeypatch: pytest.MonkeyPatch
) -> None:
    from monitor.pages import build_site
    from monitor.pages.write import MANIFEST_NAME, build_lock
    from tests.pages.test_pages import made_up_context

    folder = tmp_path / "site"
    folder.mkdir()
    comove = logging.getLogger("comove")
    monkeypatch.setattr(comove, "handlers", [])
    monkeypatch.setattr(comove, "propagate", True)
    caplog.set_level(logging.INFO, logger="comove.pages")
    finished = threading.Event()
    ctx = made_up_context()

    def second() -> None:
        build_site(ctx, folder, workers=1)
        finished.set()

    with build_lock(folder.resolve()):  # a first build is writing
        thread = threading.Thread(target=second)
        thread.start()
        time.sleep(1.5)
        assert not finished.is_set()
        assert not (folder / MANIFEST_NAME).exists()  # it wrote nothing meanwhile
    thread.join(timeout=120)
    assert finished.is_set() and (folder / MANIFEST_NAME).is_file()
    assert any("another pages build is writing" in r.getMessage() for r in caplog.records)


@pytest.mark.slow
def test_two_builds_at_once_leave_one_consistent_site(tmp_path: Path) -> None:
    import json

    from monitor.pages import build_site
    from monitor.pages.write import MANIFEST_NAME
    from tests.pages.test_pages import made_up_context

    folder = tmp_path / "site"
    contexts = [made_up_context(), made_up_context(drop_pair="KLV/DUNQ")]
    with ThreadPoolExecutor(max_workers=2) as pool:
        reports = list(pool.map(lambda c: build_site(c, folder, workers=1), contexts))
    manifest = json.loads((folder / MANIFEST_NAME).read_text())
    files = {p.relative_to(folder).as_posix() for p in folder.rglob("*")
             if p.is_file() and not p.name.startswith(".")}
    listed = set(manifest["files"])
    assert files == listed, files ^ listed  # no page left over by the other build
    assert not list(folder.rglob("*.tmp"))
    assert any(r.written > 0 for r in reports)
