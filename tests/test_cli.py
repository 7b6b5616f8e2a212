"""The command line: every command has help, errors are one line, usage errors exit 2."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from monitor.cli import COMMANDS, build_parser, main

REPO = Path(__file__).resolve().parents[1]


def test_every_command_has_help_text(capsys: pytest.CaptureFixture[str]) -> None:
    build_parser()
    assert {"init", "ingest", "instruments", "bench"} <= set(COMMANDS)
    for name, cmd in COMMANDS.items():
        assert len(cmd.help) > 20, name
        with pytest.raises(SystemExit) as info:
            main([name, "--help"])
        assert info.value.code == 0
        assert cmd.help.split()[0] in capsys.readouterr().out


def test_usage_error_exits_2(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as info:
        main(["ingest"])
    assert info.value.code == 2


def test_missing_settings_file_is_one_line_on_stderr_with_exit_1(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code = main(["init", "--config", str(tmp_path / "absent.toml")])
    err = capsys.readouterr().err
    assert code == 1
    assert err.startswith("Error: settings file ") and err.count("\n") == 1


def test_init_ingest_instruments_end_to_end_as_a_subprocess(tmp_path: Path) -> None:
    config = tmp_path / "comove.toml"
    config.write_text(
        '[desk]\ntimezone = "Europe/Berlin"\n[[instruments]]\nsymbol = "KLV"\n'
        'name = "Kelvara Industrial"\ngroup = "equities"\n'
        '[[instruments]]\nsymbol = "ORMA"\ngroup = "equities"\n'
    )
    (tmp_path / "p.csv").write_text(
        "date,symbol,close\n2024-03-04,KLV,100\n2024-03-05,KLV,101\n2024-03-05,ORMA,50\n"
    )
    (tmp_path / "bad.csv").write_text("date,symbol,close\n2024-03-06,KLV,zero\n")

    def run(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run([sys.executable, "-m", "monitor", *args, "--config", str(config)],
                              capture_output=True, text=True, cwd=tmp_path, timeout=120)

    assert run("init").returncode == 0
    ok = run("ingest", str(tmp_path / "p.csv"))
    assert ok.returncode == 0, ok.stderr
    assert "3 new closes" in ok.stdout
    bad = run("ingest", str(tmp_path / "bad.csv"))
    assert bad.returncode == 1
    assert "bad.csv:2: close 'zero' for KLV on 2024-03-06 is not a number" in bad.stderr
    assert "Traceback" not in bad.stderr
    listing = run("instruments", "--format", "csv")
    assert listing.returncode == 0
    lines = listing.stdout.strip().splitlines()
    assert lines[0] == "symbol,name,group,first,last,closes,gaps"
    assert lines[1] == "KLV,Kelvara Industrial,equities,2024-03-04,2024-03-05,2,0"
    assert lines[2] == "ORMA,,equities,2024-03-05,2024-03-05,1,0"


class _Terminal:
    """A stream that says it is a terminal and keeps what is written."""

    def __init__(self, tty: bool) -> None:
        self.tty = tty
        self.text = ""

    def isatty(self) -> bool:
        return self.tty

    def write(self, text: str) -> None:
        self.text += text

    def flush(self) -> None:
        return None


def test_backfill_progress_is_a_redrawn_bar_on_a_terminal_and_lines_otherwise() -> None:
    import datetime as dt

    from monitor.cli import ProgressLine

    day = dt.date(2024, 3, 1)
    terminal, log = _Terminal(True), _Terminal(False)
    bar, lines = ProgressLine(terminal), ProgressLine(log)
    for done in (10, 20, 50, 100):
        bar(done, 100, day)
        lines(done, 100, day)
    assert terminal.text.count("\r") == 4 and terminal.text.endswith("\n")
    assert "[" + "#" * 30 + "]" in terminal.text and "ETA" in terminal.text
    assert "days/s" in terminal.text
    assert "\r" not in log.text
    assert log.text.splitlines()[-1].startswith("progress: 100/100 days through 2024-03-01")
