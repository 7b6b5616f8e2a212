"""Seeded synthetic daily closes with correlation regimes planted on known dates.

This module owns the fictional market that feeds comove's tests and its demo: a factor
model of standardized shocks, GARCH(1,1) volatility per instrument, a trading calendar
with holidays, instruments that list later than others, random single missing closes,
and planted episodes (decouple, stress, flip, shift, stale, bad tick) whose dates and
targets are known, so that a test or a demo viewer can check what the monitor reports.

The model, for instrument ``i`` on trading day ``t``::

    z[t, i] = sum_k L[i, k] f[t, k] + sqrt(1 - sum_k L[i, k]**2) e[t, i]
    r[t, i] = vol[i] * scale[t, i] * h[t, i] * z[t, i]            (log return)
    h[t]**2 = (1 - alpha - beta) + alpha * (h[t-1] z[t-1])**2 + beta * h[t-1]**2

with factor draws ``f`` and idiosyncratic draws ``e`` independent standard normals, so the
shocks ``z`` have unit variance and ``corr(z_i, z_j) = sum_k L[i, k] L[j, k]``. Episodes
change ``L`` (decouple, flip, shift), mix a common shock into a set of instruments
(stress) or corrupt the recorded closes (stale, bad tick). Closes are
``start_price * exp(cumsum(r))`` from each instrument's listing day.

It is pure: numpy and pandas only, no clock, no disk. The same scenario (seed included)
gives the same closes bit for bit; every random stream has its own seed child, so
adding an episode never changes the draws of the others.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import date

import numpy as np
import pandas as pd

from monitor._typing import Returns2D
from monitor.demo.model import (
    SHOCK_KINDS,
    UNIT_TOLERANCE,
    Episode,
    Garch,
    InstrumentSpec,
    Scenario,
    is_finite_number,
    trading_days,
)
from monitor.errors import ConfigError

_STREAM_FACTORS, _STREAM_IDIOSYNCRATIC, _STREAM_MISSING, _STREAM_EPISODE = 0, 1, 2, 3


@dataclass(frozen=True)
class SyntheticCloses:
    """What :func:`generate` returns.

    Attributes
    ----------
    closes : pandas.DataFrame
        (T, N) recorded closes; index the trading days (DatetimeIndex named ``"date"``,
        holidays absent), columns the symbols; NaN = no close that day (before listing,
        missing, stale in ``"missing"`` mode). Stale and bad-tick faults are included.
    true_returns : pandas.DataFrame
        (T, N) log returns of the underlying price, without data faults; NaN on the
        first day and on and before each listing day.
    volatility : pandas.DataFrame
        (T, N) conditional daily volatility used on each day (every day, also before
        listing); ``true_returns / volatility`` are the planted unit-variance shocks.
    episodes : tuple of Episode
        The planted episodes, as in the scenario.
    scenario : Scenario
        The input.
    """

    closes: pd.DataFrame
    true_returns: pd.DataFrame
    volatility: pd.DataFrame
    episodes: tuple[Episode, ...]
    scenario: Scenario


def _base_loadings(scenario: Scenario) -> np.ndarray:
    column = {name: k for k, name in enumerate(scenario.factors)}
    loadings = np.zeros((len(scenario.instruments), len(scenario.factors)))
    for i, spec in enumerate(scenario.instruments):
        for name, value in spec.loadings.items():
            loadings[i, column[name]] = value
    return loadings


def _regime(
    scenario: Scenario, active: list[int]
) -> tuple[np.ndarray, list[tuple[np.ndarray, float, int]]]:
    """Loadings (N, K) and stress mixes (target indices, weight, episode position).

    ``active`` holds positions in ``scenario.episodes``, applied in that order.
    """
    row = {symbol: i for i, symbol in enumerate(scenario.symbols)}
    column = {name: k for k, name in enumerate(scenario.factors)}
    loadings = _base_loadings(scenario)
    stresses: list[tuple[np.ndarray, float, int]] = []
    for position in active:
        episode = scenario.episodes[position]
        targets = np.array([row[s] for s in scenario.targets(episode)], dtype=np.intp)
        if episode.kind == "decouple":
            loadings[targets] *= episode.effective_loading_scale
        elif episode.kind == "flip":
            assert episode.factor is not None  # checked by Episode
            loadings[targets, column[episode.factor]] *= episode.effective_loading_scale
        elif episode.kind == "shift":
            for symbol, new in episode.new_loadings.items():
                loadings[row[symbol]] = 0.0
                for name, value in new.items():
                    loadings[row[symbol], column[name]] = value
        elif episode.kind == "stress":
            stresses.append((targets, episode.common_weight, position))
        total = np.sum(loadings**2, axis=1)
        if np.any(total > 1 + UNIT_TOLERANCE):
            worst = int(np.argmax(total))
            raise ConfigError(
                f"episode {episode.kind!r} starting {episode.start}: loadings of "
                f"{scenario.symbols[worst]} square-sum to {total[worst]:.4f}; must be <= 1"
            )
    return loadings, stresses


def planted_correlation(scenario: Scenario, on: date) -> pd.DataFrame:
    """Correlation of the planted shocks on one day (what an ideal estimator would see).

    Parameters
    ----------
    scenario : Scenario
    on : date
        Any date; the episodes with ``start <= on <= end`` shape the answer.

    Returns
    -------
    pandas.DataFrame
        (N, N), symbols on both axes, unit diagonal, no NaN. Stale and bad-tick episodes
        do not change it (they corrupt recorded closes, not the market).
    """
    active = [
        j
        for j, e in enumerate(scenario.episodes)
        if e.kind in SHOCK_KINDS and e.start <= on <= e.end
    ]
    loadings, stresses = _regime(scenario, active)
    corr = loadings @ loadings.T
    np.fill_diagonal(corr, 1.0)
    for targets, weight, _ in stresses:
        keep = math.sqrt(1 - weight)
        corr[targets, :] *= keep
        corr[:, targets] *= keep
        corr[np.ix_(targets, targets)] += weight
    return pd.DataFrame(corr, index=list(scenario.symbols), columns=list(scenario.symbols))


def _rng(seed: int, stream: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(stream,)))


def _spans(scenario: Scenario, days: pd.DatetimeIndex) -> list[tuple[int, int]]:
    """[first, stop) trading-day positions of each episode."""
    return [
        (
            int(days.searchsorted(pd.Timestamp(e.start), side="left")),
            int(days.searchsorted(pd.Timestamp(e.end), side="right")),
        )
        for e in scenario.episodes
    ]


def _shocks(
    scenario: Scenario, days: pd.DatetimeIndex, spans: list[tuple[int, int]]
) -> Returns2D:
    """Unit-variance planted shocks (T, N), regime by regime."""
    n_days, n_instruments = len(days), len(scenario.instruments)
    factors = _rng(scenario.seed, _STREAM_FACTORS).standard_normal((n_days, len(scenario.factors)))
    own = _rng(scenario.seed, _STREAM_IDIOSYNCRATIC).standard_normal((n_days, n_instruments))
    shock_episodes = [j for j, e in enumerate(scenario.episodes) if e.kind in SHOCK_KINDS]
    active = np.zeros((n_days, len(shock_episodes)), dtype=bool)
    for column, j in enumerate(shock_episodes):
        active[spans[j][0] : spans[j][1], column] = True
    # A regime is a run of days with the same set of active episodes.
    changes = np.flatnonzero(np.any(active[1:] != active[:-1], axis=1)) + 1
    bounds = [0, *changes.tolist(), n_days]
    common: dict[int, np.ndarray] = {}
    shocks = np.empty((n_days, n_instruments))
    for first, stop in zip(bounds[:-1], bounds[1:], strict=True):
        on = [j for c, j in enumerate(shock_episodes) if active[first, c]]
        loadings, stresses = _regime(scenario, on)
        own_weight = np.sqrt(np.clip(1 - np.sum(loadings**2, axis=1), 0.0, None))
        block = factors[first:stop] @ loadings.T + own[first:stop] * own_weight
        for targets, weight, j in stresses:
            if j not in common:
                common[j] = _rng(scenario.seed, _STREAM_EPISODE + j).standard_normal(n_days)
            block[:, targets] = math.sqrt(1 - weight) * block[:, targets] + math.sqrt(
                weight
            ) * common[j][first:stop, None]
        shocks[first:stop] = block
    return shocks


def _garch_scale(shocks: Returns2D, garch: Garch | None) -> Returns2D:
    """Conditional standard deviation h (T, N) with unit long-run variance."""
    scale = np.ones_like(shocks)
    if garch is None or garch.alpha == 0:
        return scale
    variance = np.ones(shocks.shape[1])
    squared = shocks**2
    constant = 1 - garch.alpha - garch.beta
    for t in range(1, shocks.shape[0]):
        # h2_t = c + h2_{t-1} (alpha z2_{t-1} + beta): the shock's own day sets tomorrow.
        variance = constant + variance * (garch.alpha * squared[t - 1] + garch.beta)
        scale[t] = variance
    return np.sqrt(scale)


def generate(scenario: Scenario) -> SyntheticCloses:
    """Simulate the scenario's closes.

    Parameters
    ----------
    scenario : Scenario

    Returns
    -------
    SyntheticCloses
        Closes (T, N) on the trading days, positive and finite where present.

    Raises
    ------
    ConfigError
        Fewer than two trading days, an episode that pushes loadings past unit
        variance, or a stale / bad-tick episode on an instrument not yet listed.
    """
    days = trading_days(scenario.start, scenario.end, scenario.holidays)
    n_days, n_instruments = len(days), len(scenario.instruments)
    if n_days < 2:
        raise ConfigError(
            f"scenario {scenario.start}..{scenario.end} holds {n_days} trading days; need >= 2"
        )
    spans = _spans(scenario, days)
    shocks = _shocks(scenario, days, spans)
    vol = np.array([spec.vol for spec in scenario.instruments])
    volatility = _garch_scale(shocks, scenario.garch) * vol
    column = {symbol: i for i, symbol in enumerate(scenario.symbols)}
    for episode, (first, stop) in zip(scenario.episodes, spans, strict=True):
        if episode.vol_scale != 1.0:
            targets = [column[s] for s in scenario.targets(episode)]
            volatility[first:stop, targets] *= episode.vol_scale
    returns = volatility * shocks

    listing = np.array(
        [
            0 if spec.first_date is None else int(days.searchsorted(pd.Timestamp(spec.first_date)))
            for spec in scenario.instruments
        ]
    )
    position = np.arange(n_days)[:, None]
    before_listing = position < listing[None, :]
    # The listing day carries no return so that its close is exactly start_price.
    accrued = np.where(position <= listing[None, :], 0.0, returns)
    start_price = np.array([spec.start_price for spec in scenario.instruments])
    true_closes = start_price * np.exp(np.cumsum(accrued, axis=0))
    true_returns = np.where(position <= listing[None, :], np.nan, returns)

    draws = _rng(scenario.seed, _STREAM_MISSING).random((n_days, n_instruments))
    missing = (draws < scenario.missing_rate) & (position > listing[None, :])
    missing[1:] &= ~missing[:-1]  # single missing closes, never two in a row
    closes = np.where(before_listing | missing, np.nan, true_closes)

    for episode, (first, stop) in zip(scenario.episodes, spans, strict=True):
        if episode.kind not in ("stale", "bad_tick") or first >= stop:
            continue
        for symbol in scenario.targets(episode):
            i = column[symbol]
            label = f"episode {episode.kind!r} starting {episode.start}"
            if episode.kind == "bad_tick":
                if first < listing[i]:
                    raise ConfigError(f"{label}: {symbol} is not listed yet")
                closes[first, i] = true_closes[first, i] * episode.tick_multiplier
            elif episode.stale_mode == "missing":
                closes[first:stop, i] = np.nan
            else:
                if first <= listing[i]:
                    raise ConfigError(f"{label}: {symbol} has no close before the stale span")
                closes[first - 1 : stop, i] = true_closes[first - 1, i]

    symbols = list(scenario.symbols)

    def frame(values: np.ndarray) -> pd.DataFrame:
        return pd.DataFrame(values, index=days, columns=pd.Index(symbols, name="symbol"))

    return SyntheticCloses(
        closes=frame(closes),
        true_returns=frame(true_returns),
        volatility=frame(volatility),
        episodes=scenario.episodes,
        scenario=scenario,
    )


def to_long_csv_rows(closes: pd.DataFrame) -> Iterator[tuple[str, str, float]]:
    """Yield ``(ISO date, symbol, close)`` for every present close, date by date.

    Parameters
    ----------
    closes : pandas.DataFrame
        (T, N) with a DatetimeIndex; NaN cells are skipped (no row for a missing close).
    """
    if not isinstance(closes.index, pd.DatetimeIndex):
        raise TypeError(f"closes must have a DatetimeIndex, got {type(closes.index).__name__}")
    dates = closes.index.strftime("%Y-%m-%d").tolist()
    symbols = [str(c) for c in closes.columns]
    values = closes.to_numpy(dtype=np.float64)
    rows, cols = np.nonzero(np.isfinite(values))
    for r, c in zip(rows.tolist(), cols.tolist(), strict=True):
        yield dates[r], symbols[c], float(values[r, c])


def two_regime_pair(
    seed: int,
    n_days: int,
    rho_before: float,
    rho_after: float,
    change_day: int,
    *,
    vol: float = 0.01,
    garch: Garch | None = None,
    start: date = date(2021, 1, 4),
    symbols: tuple[str, str] = ("KLV", "ORMA"),
) -> SyntheticCloses:
    """Two instruments whose shock correlation changes once, on a known day.

    Parameters
    ----------
    seed : int
    n_days : int
        Business days from ``start`` (no holidays, no missing closes), >= 4.
    rho_before, rho_after : float
        Planted correlation, in [-1, 1], before and from ``closes.index[change_day]``.
    change_day : int
        Position of the first day of the new regime, in [2, n_days - 2]. The return on
        that day (close ``change_day - 1`` to ``change_day``) already follows ``rho_after``.
    vol : float
        Daily volatility of both.
    garch : Garch or None
        None (default) keeps volatility constant so returns carry the plain correlation.
    start : date
    symbols : (str, str)
    """
    for name, rho in (("rho_before", rho_before), ("rho_after", rho_after)):
        if not is_finite_number(rho) or not -1 <= rho <= 1:
            raise ConfigError(f"{name} must be in [-1, 1], got {rho!r}")
    if not isinstance(n_days, int) or n_days < 4:
        raise ConfigError(f"n_days must be an integer >= 4, got {n_days!r}")
    if not isinstance(change_day, int) or not 2 <= change_day <= n_days - 2:
        raise ConfigError(f"change_day must be in [2, {n_days - 2}], got {change_day!r}")
    days = pd.bdate_range(start, periods=n_days)
    first, second = symbols

    def pair_loadings(rho: float) -> tuple[float, float]:
        weight = math.sqrt(abs(rho))
        return weight, math.copysign(weight, rho)

    before, after = pair_loadings(rho_before), pair_loadings(rho_after)
    scenario = Scenario(
        instruments=(
            InstrumentSpec(first, first, "pair", vol=vol, loadings={"pair": before[0]}),
            InstrumentSpec(second, second, "pair", vol=vol, loadings={"pair": before[1]}),
        ),
        factors=("pair",),
        start=days[0].date(),
        end=days[-1].date(),
        seed=seed,
        episodes=(
            Episode(
                kind="shift",
                start=days[change_day].date(),
                end=days[-1].date(),
                new_loadings={first: {"pair": after[0]}, second: {"pair": after[1]}},
                description=(
                    f"{first} and {second} move from correlation {rho_before:g} "
                    f"to {rho_after:g} from {days[change_day].date()}."
                ),
            ),
        ),
        missing_rate=0.0,
        garch=garch,
    )
    return generate(scenario)
