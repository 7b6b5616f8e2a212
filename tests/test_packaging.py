"""Packaging: the built wheel carries templates/ and config/; lint and types are clean."""

from __future__ import annotations

import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


@pytest.mark.slow
def test_wheel_ships_templates_and_config_as_package_data(tmp_path: Path) -> None:
    result = subprocess.run(
        [sys.executable, "-m", "build", "--wheel", "--no-isolation", "--outdir", str(tmp_path),
         str(REPO)],
        capture_output=True, text=True, timeout=300,
    )
    assert result.returncode == 0, result.stderr[-2000:]
    wheel = next(tmp_path.glob("comove-*.whl"))
    names = set(zipfile.ZipFile(wheel).namelist())
    for folder in ("templates", "config"):
        shipped = {n for n in names if n.startswith(f"monitor/_data/{folder}/")}
        expected = {f"monitor/_data/{folder}/{p.relative_to(REPO / folder).as_posix()}"
                    for p in (REPO / folder).rglob("*") if p.is_file()}
        assert expected and expected <= shipped, f"{folder}/ missing from the wheel"
    assert "monitor/py.typed" in names and "storage/py.typed" in names
    entry = next(n for n in names if n.endswith("entry_points.txt"))
    assert "comove = monitor.cli:main" in zipfile.ZipFile(wheel).read(entry).decode()


@pytest.mark.slow
def test_ruff_is_clean_on_monitor_and_storage() -> None:
    ruff = shutil.which("ruff", path=str(Path(sys.executable).parent)) or "ruff"
    result = subprocess.run([ruff, "check", "monitor", "storage"], cwd=REPO,
                            capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stdout[-3000:]


@pytest.mark.slow
def test_mypy_is_clean_on_monitor_and_storage() -> None:
    result = subprocess.run([sys.executable, "-m", "mypy"], cwd=REPO,
                            capture_output=True, text=True, timeout=600)
    assert result.returncode == 0, result.stdout[-3000:]
