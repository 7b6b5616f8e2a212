"""Slow, obvious reference computations for the engine's tests, and the shared-data locator.

Every function here loops over days and pairs and computes each value on its own from the
pair's common days, with a two-pass formula (``np.corrcoef``, explicit weighted means, or
``scipy.stats.spearmanr``). Nothing is shared with the engine's code.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import numpy.typing as npt
import pytest
from scipy import stats

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]

REPO_ROOT = Path(__file__).resolve().parents[1]


def shared_data_dir() -> Path:
    """The outside reference data directory; the calling test FAILS if there is none.

    Looked for, in order: ``../shared/data`` beside the repository root, then the
    directory in ``$COMOVE_SHARED_DATA``.
    """
    candidates = [REPO_ROOT.parent / "shared" / "data"]
    if os.environ.get("COMOVE_SHARED_DATA"):
        candidates.append(Path(os.environ["COMOVE_SHARED_DATA"]))
    for candidate in candidates:
        if candidate.is_dir():
            return candidate
    pytest.fail(
        "reference data directory not found; looked in "
        + ", ".join(str(c) for c in candidates)
        + " (set COMOVE_SHARED_DATA to the directory holding anscombe_1973.csv)"
    )


def read_csv_columns(path: Path) -> dict[str, list[str]]:
    """Columns of a small CSV whose comment lines start with ``#``."""
    lines = [line.strip() for line in path.read_text().splitlines()]
    rows = [line.split(",") for line in lines if line and not line.startswith("#")]
    header, body = rows[0], rows[1:]
    return {name: [row[k] for row in body] for k, name in enumerate(header)}


def anscombe_sets() -> dict[str, tuple[FloatArray, FloatArray]]:
    """The four sets of Anscombe (1973) as ``{set: (x, y)}``."""
    columns = read_csv_columns(shared_data_dir() / "anscombe_1973.csv")
    sets: dict[str, tuple[FloatArray, FloatArray]] = {}
    for name in dict.fromkeys(columns["set"]):
        keep = [k for k, s in enumerate(columns["set"]) if s == name]
        x = np.array([float(columns["x"][k]) for k in keep])
        y = np.array([float(columns["y"][k]) for k in keep])
        sets[name] = (x, y)
    return sets


def norris() -> tuple[FloatArray, FloatArray]:
    """NIST StRD Norris (x, y), 36 observations."""
    columns = read_csv_columns(shared_data_dir() / "nist_norris.csv")
    return np.array(columns["x"], dtype=float), np.array(columns["y"], dtype=float)


def _pair_days(
    returns: FloatArray, i: int, j: int, lo: int, hi: int
) -> tuple[FloatArray, FloatArray, npt.NDArray[np.intp]]:
    """The pair's common rows in ``lo .. hi-1``: x, y and the row numbers."""
    x = returns[lo:hi, i]
    y = returns[lo:hi, j]
    keep = ~(np.isnan(x) | np.isnan(y))
    return x[keep], y[keep], np.flatnonzero(keep) + lo


def _constant(values: FloatArray) -> bool:
    return values.size > 0 and bool(np.all(values == values[0]))


def reference_rolling(
    returns: FloatArray, window: int, min_count: int, *, rank: bool = False
) -> tuple[FloatArray, FloatArray, BoolArray]:
    """Rolling Pearson (or Spearman) per day and pair over the pair's common days.

    Returns ``(value, n, stale)`` shaped (T, N, N): NaN below ``min_count`` common days;
    NaN and stale where a side is exactly constant over the common days.
    """
    rows, columns = returns.shape
    value = np.full((rows, columns, columns), np.nan)
    count = np.zeros((rows, columns, columns))
    stale = np.zeros((rows, columns, columns), dtype=bool)
    for t in range(rows):
        lo = max(0, t - window + 1)
        for i in range(columns):
            for j in range(i, columns):
                x, y, _ = _pair_days(returns, i, j, lo, t + 1)
                count[t, i, j] = count[t, j, i] = x.size
                if x.size < min_count:
                    continue
                if _constant(x) or _constant(y):
                    stale[t, i, j] = stale[t, j, i] = True
                    continue
                if rank:
                    r = stats.spearmanr(x, y).statistic
                else:
                    r = np.corrcoef(x, y)[0, 1]
                value[t, i, j] = value[t, j, i] = r
    return value, count, stale


def reference_ewma(
    returns: FloatArray, lam: float, min_count: float, *, centred: bool = True
) -> tuple[FloatArray, FloatArray, BoolArray]:
    """EWMA correlation per day and pair with weights ``lam ** (t - s)`` on common days.

    ``centred``: weighted means removed (as pandas' ``ewm().corr()``); else zero mean.
    Returns ``(value, n_eff, stale)`` shaped (T, N, N).
    """
    rows, columns = returns.shape
    value = np.full((rows, columns, columns), np.nan)
    count = np.zeros((rows, columns, columns))
    stale = np.zeros((rows, columns, columns), dtype=bool)
    for t in range(rows):
        for i in range(columns):
            for j in range(i, columns):
                x, y, days = _pair_days(returns, i, j, 0, t + 1)
                if x.size == 0:
                    continue
                w = lam ** (t - days).astype(float)
                n_eff = w.sum() ** 2 / (w * w).sum()
                count[t, i, j] = count[t, j, i] = n_eff
                if n_eff < min_count * (1 - 1e-12):
                    continue
                if centred:
                    dx = x - np.sum(w * x) / w.sum()
                    dy = y - np.sum(w * y) / w.sum()
                    flat = _constant(x) or _constant(y)
                else:
                    dx, dy = x, y
                    flat = not np.any(x) or not np.any(y)
                if flat:
                    stale[t, i, j] = stale[t, j, i] = True
                    continue
                r = np.sum(w * dx * dy) / np.sqrt(np.sum(w * dx * dx) * np.sum(w * dy * dy))
                value[t, i, j] = value[t, j, i] = r
    return value, count, stale


def two_pass_correlation(x: FloatArray, y: FloatArray) -> float:
    """Textbook two-pass Pearson correlation of two NaN-free vectors."""
    dx = x - x.mean()
    dy = y - y.mean()
    return float(np.dot(dx, dy) / np.sqrt(np.dot(dx, dx) * np.dot(dy, dy)))


def desk_returns(rows: int = 260, columns: int = 7, seed: int = 20240607) -> FloatArray:
    """Seeded returns of a fictional desk with the awkward cases the engine must handle.

    Columns (fictional instruments): 0 KLV and 1 ORMA share a factor (r about 0.6); 2 TEZ10
    starts late (listed after 40 rows); 3 BRAND has scattered missing days; 4 VOSK has a
    stale close (exactly zero returns for 70 rows, longer than a 30-row window); 5 PELL
    is negatively tied to KLV; 6 NIRA has a block of missing days.
    """
    rng = np.random.default_rng(seed)
    factor = rng.standard_normal(rows)
    noise = rng.standard_normal((rows, columns))
    returns = 0.01 * noise
    returns[:, 0] += 0.008 * factor
    returns[:, 1] += 0.007 * factor
    returns[:, 5] -= 0.006 * factor
    returns[:40, 2] = np.nan
    returns[rng.choice(rows, size=rows // 12, replace=False), 3] = np.nan
    returns[100:170, 4] = 0.0
    returns[150:175, 6] = np.nan
    returns[0, :] = np.nan  # the first row has no return: no previous close
    return returns


def finite_max_difference(a: FloatArray, b: FloatArray) -> float:
    """Largest |a - b| where both are finite (0.0 when there is no such entry)."""
    both = np.isfinite(a) & np.isfinite(b)
    return float(np.max(np.abs(a[both] - b[both]), initial=0.0))
