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
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from datetime import date
from typing import Literal

import numpy as np
import pandas as pd

from monitor._typing import Returns2D
from monitor.errors import ConfigError

EpisodeKind = Literal["decouple", "stress", "flip", "shift", "stale", "bad_tick"]
StaleMode = Literal["repeat", "missing"]

EPISODE_KINDS: tuple[EpisodeKind, ...] = (
    "decouple",
    "stress",
    "flip",
    "shift",
    "stale",
    "bad_tick",
)
_SHOCK_KINDS = frozenset({"decouple", "stress", "flip", "shift"})
_DEFAULT_LOADING_SCALE = {"decouple": 0.0, "flip": -1.0}
_UNIT_TOLERANCE = 1e-12

# Seed-sequence children; episode common shocks use _STREAM_EPISODE + episode index.
_STREAM_FACTORS, _STREAM_IDIOSYNCRATIC, _STREAM_MISSING, _STREAM_EPISODE = 0, 1, 2, 3


def _finite(value: float) -> bool:
    return isinstance(value, int | float) and math.isfinite(value)


@dataclass(frozen=True)
class Garch:
    """GARCH(1,1) (Bollerslev 1986) volatility clustering on a unit long-run variance.

    Parameters
    ----------
    alpha : float
        Weight of yesterday's squared shock, >= 0.
    beta : float
        Weight of yesterday's variance, >= 0; ``alpha + beta < 1`` keeps it stationary.
    """

    alpha: float = 0.05
    beta: float = 0.90

    def __post_init__(self) -> None:
        if not _finite(self.alpha) or self.alpha < 0:
            raise ConfigError(f"garch alpha must be >= 0, got {self.alpha!r}")
        if not _finite(self.beta) or self.beta < 0:
            raise ConfigError(f"garch beta must be >= 0, got {self.beta!r}")
        if self.alpha + self.beta >= 1:
            raise ConfigError(
                f"garch alpha + beta must be < 1, got {self.alpha!r} + {self.beta!r}"
            )


@dataclass(frozen=True)
class InstrumentSpec:
    """One fictional instrument.

    Parameters
    ----------
    symbol, name, group, currency : str
        Code, long name, group on the desk and quote currency (all invented).
    start_price : float
        Close on the listing day, > 0.
    vol : float
        Long-run daily volatility of log returns, in (0, 0.2].
    loadings : dict[str, float]
        Factor name -> loading; the squares sum to at most 1 (the rest is idiosyncratic).
    first_date : date or None
        Listing date; no close before it. None lists the instrument on the first day.
    """

    symbol: str
    name: str
    group: str
    currency: str = "KRD"
    start_price: float = 100.0
    vol: float = 0.01
    loadings: dict[str, float] = field(default_factory=dict)
    first_date: date | None = None

    def __post_init__(self) -> None:
        if not self.symbol or self.symbol != self.symbol.strip() or "," in self.symbol:
            raise ConfigError(
                f"instrument symbol must be a plain non-empty code, got {self.symbol!r}"
            )
        if not _finite(self.start_price) or self.start_price <= 0:
            raise ConfigError(
                f"instrument {self.symbol} start_price must be > 0, got {self.start_price!r}"
            )
        if not _finite(self.vol) or not 0 < self.vol <= 0.2:
            raise ConfigError(f"instrument {self.symbol} vol must be in (0, 0.2], got {self.vol!r}")
        if not all(_finite(v) for v in self.loadings.values()):
            raise ConfigError(
                f"instrument {self.symbol} loadings must be finite, got {self.loadings!r}"
            )
        total = sum(v * v for v in self.loadings.values())
        if total > 1 + _UNIT_TOLERANCE:
            raise ConfigError(
                f"instrument {self.symbol} loadings square-sum to {total:.4f}; must be <= 1"
            )


@dataclass(frozen=True)
class Episode:
    """A planted regime or data fault between ``start`` and ``end`` (both inclusive).

    Targets are ``symbols`` plus every member of ``group`` (for ``shift``: the keys of
    ``new_loadings``). What each kind does on its trading days:

    ``decouple``
        Every factor loading of the targets is multiplied by ``loading_scale``
        (default 0.0): their idiosyncratic shocks dominate and their correlations with
        each other and with everything else fall towards zero.
    ``stress``
        A common shock of weight ``common_weight`` is mixed into the targets' shocks:
        a pair's correlation ``rho`` becomes ``(1 - w) rho + w``.
    ``flip``
        The targets' loading on ``factor`` is multiplied by ``loading_scale``
        (default -1.0), so correlations running through that factor change sign.
    ``shift``
        The targets' loadings are replaced by ``new_loadings`` (symbol -> factor ->
        loading; factors left out become zero).
    ``stale``
        Recorded closes are corrupted: ``stale_mode="repeat"`` repeats the last close
        before ``start`` (zero returns), ``"missing"`` records no close at all. The true
        price keeps moving, so the first good close after the span jumps.
    ``bad_tick``
        One recorded close (``start == end``, a trading day) is multiplied by
        ``tick_multiplier``; the next close is good again.

    ``vol_scale`` multiplies the targets' volatility on the episode's days (any kind).
    ``description`` says in plain words what was planted, for tests and demo viewers.
    """

    kind: EpisodeKind
    start: date
    end: date
    symbols: tuple[str, ...] = ()
    group: str | None = None
    description: str = ""
    loading_scale: float | None = None
    factor: str | None = None
    common_weight: float = 0.6
    new_loadings: Mapping[str, Mapping[str, float]] = field(default_factory=dict)
    vol_scale: float = 1.0
    stale_mode: StaleMode = "repeat"
    tick_multiplier: float = 10.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "symbols", tuple(self.symbols))
        label = f"episode {self.kind!r} starting {self.start}"
        if self.kind not in EPISODE_KINDS:
            raise ConfigError(
                f"episode kind must be one of {', '.join(EPISODE_KINDS)}, got {self.kind!r}"
            )
        if self.end < self.start:
            raise ConfigError(f"{label}: end {self.end} is before start {self.start}")
        if not (self.symbols or self.group or self.new_loadings):
            raise ConfigError(f"{label}: needs symbols or a group to act on")
        if not _finite(self.vol_scale) or self.vol_scale <= 0:
            raise ConfigError(f"{label}: vol_scale must be > 0, got {self.vol_scale!r}")
        if self.loading_scale is not None:
            if self.kind not in _DEFAULT_LOADING_SCALE:
                raise ConfigError(f"{label}: loading_scale applies to decouple and flip only")
            if not _finite(self.loading_scale):
                raise ConfigError(
                    f"{label}: loading_scale must be finite, got {self.loading_scale!r}"
                )
        if self.kind == "flip" and not self.factor:
            raise ConfigError(f"{label}: flip needs the factor whose loading changes")
        if self.kind == "stress" and not (
            _finite(self.common_weight) and 0 < self.common_weight < 1
        ):
            raise ConfigError(
                f"{label}: common_weight must be in (0, 1), got {self.common_weight!r}"
            )
        if self.kind == "shift":
            if not self.new_loadings:
                raise ConfigError(f"{label}: shift needs new_loadings")
            if self.symbols and set(self.symbols) != set(self.new_loadings):
                raise ConfigError(
                    f"{label}: symbols {self.symbols!r} differ from new_loadings keys"
                )
            if self.group is not None:
                raise ConfigError(f"{label}: shift takes new_loadings, not a group")
        if self.kind == "stale" and self.stale_mode not in ("repeat", "missing"):
            raise ConfigError(
                f"{label}: stale_mode must be 'repeat' or 'missing', got {self.stale_mode!r}"
            )
        if self.kind == "bad_tick":
            if self.start != self.end:
                raise ConfigError(f"{label}: bad_tick is one day; end {self.end} != start")
            if not _finite(self.tick_multiplier) or self.tick_multiplier <= 0 or (
                self.tick_multiplier == 1
            ):
                raise ConfigError(
                    f"{label}: tick_multiplier must be > 0 and != 1, got {self.tick_multiplier!r}"
                )

    @property
    def effective_loading_scale(self) -> float:
        """``loading_scale``, or the kind's default when it was left out."""
        if self.loading_scale is not None:
            return self.loading_scale
        return _DEFAULT_LOADING_SCALE.get(self.kind, 1.0)


def trading_days(start: date, end: date, holidays: Iterable[date] = ()) -> pd.DatetimeIndex:
    """Business days (Monday to Friday) from ``start`` to ``end`` inclusive, minus holidays.

    Returns
    -------
    pandas.DatetimeIndex
        Named ``"date"``, increasing, no frequency.
    """
    days = pd.bdate_range(start, end, name="date")
    off = pd.DatetimeIndex([pd.Timestamp(h) for h in holidays])
    return pd.DatetimeIndex(days[~days.isin(off)], name="date", freq=None)


@dataclass(frozen=True)
class Scenario:
    """Everything :func:`generate` needs; validated on construction.

    Parameters
    ----------
    instruments : tuple of InstrumentSpec
        Unique symbols; loadings only on declared ``factors``.
    factors : tuple of str
        Names of the independent standard-normal factors.
    start, end : date
        First and last calendar date (inclusive).
    seed : int
        Seed of every random stream.
    episodes : tuple of Episode
        Applied in order; dates inside ``[start, end]``.
    holidays : tuple of date
        Business days on which nobody has a close (the market is shut, no return accrues).
    missing_rate : float
        Chance per instrument and trading day (after listing) of a single missing close.
    garch : Garch or None
        Volatility clustering; None gives constant volatility.
    """

    instruments: tuple[InstrumentSpec, ...]
    factors: tuple[str, ...]
    start: date
    end: date
    seed: int
    episodes: tuple[Episode, ...] = ()
    holidays: tuple[date, ...] = ()
    missing_rate: float = 0.002
    garch: Garch | None = field(default_factory=Garch)

    def __post_init__(self) -> None:
        for name in ("instruments", "factors", "episodes", "holidays"):
            object.__setattr__(self, name, tuple(getattr(self, name)))
        if not self.instruments:
            raise ConfigError("scenario instruments must not be empty")
        symbols = [spec.symbol for spec in self.instruments]
        repeated = sorted({s for s in symbols if symbols.count(s) > 1})
        if repeated:
            raise ConfigError(f"scenario instrument symbols repeat: {', '.join(repeated)}")
        if len(set(self.factors)) != len(self.factors):
            raise ConfigError(f"scenario factors repeat: {self.factors!r}")
        if self.end < self.start:
            raise ConfigError(f"scenario end {self.end} is before start {self.start}")
        if not isinstance(self.seed, int) or self.seed < 0:
            raise ConfigError(f"scenario seed must be an integer >= 0, got {self.seed!r}")
        if not _finite(self.missing_rate) or not 0 <= self.missing_rate < 0.5:
            raise ConfigError(
                f"scenario missing_rate must be in [0, 0.5), got {self.missing_rate!r}"
            )
        for spec in self.instruments:
            unknown = sorted(set(spec.loadings) - set(self.factors))
            if unknown:
                raise ConfigError(
                    f"instrument {spec.symbol} loads on unknown factor {unknown[0]!r}"
                )
            if spec.first_date is not None and not self.start <= spec.first_date <= self.end:
                raise ConfigError(
                    f"instrument {spec.symbol} first_date {spec.first_date} is outside the scenario"
                )
        for episode in self.episodes:
            self._check_episode(episode)

    def _check_episode(self, episode: Episode) -> None:
        label = f"episode {episode.kind!r} starting {episode.start}"
        if episode.start < self.start or episode.end > self.end:
            raise ConfigError(f"{label}: dates fall outside the scenario {self.start}..{self.end}")
        known = {spec.symbol for spec in self.instruments}
        named = set(episode.symbols) | set(episode.new_loadings)
        for symbol in sorted(named - known):
            raise ConfigError(f"{label}: unknown symbol {symbol!r}")
        if episode.group is not None and episode.group not in {s.group for s in self.instruments}:
            raise ConfigError(f"{label}: unknown group {episode.group!r}")
        if episode.factor is not None and episode.factor not in self.factors:
            raise ConfigError(f"{label}: unknown factor {episode.factor!r}")
        for symbol, loadings in episode.new_loadings.items():
            unknown = sorted(set(loadings) - set(self.factors))
            if unknown:
                raise ConfigError(f"{label}: {symbol} loads on unknown factor {unknown[0]!r}")
        if episode.kind == "bad_tick":
            if len(self.targets(episode)) != 1:
                raise ConfigError(f"{label}: bad_tick acts on exactly one symbol")
            days = trading_days(episode.start, episode.end, self.holidays)
            if len(days) != 1:
                raise ConfigError(f"{label}: bad_tick date {episode.start} is not a trading day")

    @property
    def symbols(self) -> tuple[str, ...]:
        """Instrument symbols, in column order."""
        return tuple(spec.symbol for spec in self.instruments)

    def targets(self, episode: Episode) -> tuple[str, ...]:
        """Symbols an episode acts on, in column order."""
        chosen = set(episode.symbols) | set(episode.new_loadings)
        return tuple(
            spec.symbol
            for spec in self.instruments
            if spec.symbol in chosen or (episode.group is not None and spec.group == episode.group)
        )


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
        if np.any(total > 1 + _UNIT_TOLERANCE):
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
        if e.kind in _SHOCK_KINDS and e.start <= on <= e.end
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
    shock_episodes = [j for j, e in enumerate(scenario.episodes) if e.kind in _SHOCK_KINDS]
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
        if not _finite(rho) or not -1 <= rho <= 1:
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


# ---------------------------------------------------------------------------------------
# The demo desk: a fictional multi-asset book. Every name, code and currency is invented.
# Home currency: the Kordan ral (KRD). Foreign: Valmer mark (VLM), Osnet crown (OSN),
# Tezar peso (TZP), Pavolen lira (PVL), Zelm franc (ZLF).

DEMO_FACTORS: tuple[str, ...] = ("market", "industrials", "rates", "energy", "currency", "credit")

_DEMO_INSTRUMENTS: tuple[tuple[str, str, str, str, float, float, dict[str, float]], ...] = (
    # symbol, name, group, currency, start price, daily vol, loadings
    ("KLV", "Kelvara Industrial", "equities", "KRD", 48.0, 0.014,
     {"market": 0.55, "industrials": 0.70}),
    ("DUNQ", "Dunquist Shipping", "equities", "KRD", 31.5, 0.016,
     {"market": 0.50, "industrials": 0.70}),
    ("ORMA", "Orma Utilities", "equities", "KRD", 22.0, 0.009, {"market": 0.45, "rates": 0.25}),
    ("VSKR", "Veskar Semiconductors", "equities", "KRD", 140.0, 0.022, {"market": 0.75}),
    ("TRQL", "Tranquel Pharmaceuticals", "equities", "KRD", 87.0, 0.013, {"market": 0.50}),
    ("PELV", "Pelvane Telecom", "equities", "KRD", 12.4, 0.011, {"market": 0.55}),
    ("SARN", "Sarnow Banking Group", "equities", "KRD", 55.0, 0.017,
     {"market": 0.65, "credit": 0.30}),
    ("MRBX", "Marrowbeck Retail", "equities", "KRD", 20.0, 0.018, {"market": 0.60}),
    ("TEZ02", "Tezar 2-year note future", "rates", "TZP", 101.5, 0.0015,
     {"rates": 0.80, "market": -0.10}),
    ("TEZ05", "Tezar 5-year note future", "rates", "TZP", 108.0, 0.003,
     {"rates": 0.90, "market": -0.20}),
    ("TEZ10", "Tezar 10-year bond future", "rates", "TZP", 112.0, 0.005,
     {"rates": 0.75, "market": -0.40}),
    ("TEZ30", "Tezar 30-year bond future", "rates", "TZP", 125.0, 0.008,
     {"rates": 0.70, "market": -0.35}),
    ("VLM10", "Valmer 10-year bond future", "rates", "VLM", 131.0, 0.005,
     {"rates": 0.60, "market": -0.25, "currency": 0.20}),
    ("OLM1", "Olmeth light crude, front contract", "commodities", "KRD", 74.0, 0.021,
     {"energy": 0.95, "market": 0.20}),
    ("OLM2", "Olmeth light crude, second contract", "commodities", "KRD", 73.2, 0.019,
     {"energy": 0.94, "market": 0.20}),
    ("GSV1", "Gasvane natural gas, front contract", "commodities", "KRD", 3.1, 0.030,
     {"energy": 0.45}),
    ("RDM1", "Redmarsh copper, front contract", "commodities", "KRD", 8900.0, 0.015,
     {"market": 0.45, "industrials": 0.30}),
    ("ZNT1", "Zentmoor zinc, front contract", "commodities", "KRD", 2650.0, 0.016,
     {"market": 0.40, "industrials": 0.30}),
    ("WHB1", "Whitbarrow wheat, front contract", "commodities", "KRD", 610.0, 0.017,
     {"market": 0.10}),
    ("VLMKRD", "Valmer mark in Kordan ral", "currencies", "KRD", 1.18, 0.006,
     {"currency": 0.60, "market": -0.10}),
    ("OSNKRD", "Osnet crown in Kordan ral", "currencies", "KRD", 0.095, 0.007,
     {"currency": 0.55, "market": 0.20}),
    ("TZPKRD", "Tezar peso in Kordan ral", "currencies", "KRD", 0.052, 0.005,
     {"currency": 0.50, "rates": 0.20}),
    ("PVLKRD", "Pavolen lira in Kordan ral", "currencies", "KRD", 0.031, 0.009,
     {"currency": 0.45, "market": 0.30}),
    ("ZLFKRD", "Zelm franc in Kordan ral", "currencies", "KRD", 1.07, 0.004,
     {"currency": 0.50, "market": -0.25}),
    ("KCI5", "Kordan investment-grade credit index, 5-year", "credit", "KRD", 100.0, 0.002,
     {"credit": 0.75, "market": 0.25, "rates": 0.25}),
    ("KCH5", "Kordan high-yield credit index, 5-year", "credit", "KRD", 100.0, 0.004,
     {"credit": 0.70, "market": 0.45}),
    ("VCI5", "Valmer investment-grade credit index, 5-year", "credit", "VLM", 100.0, 0.0022,
     {"credit": 0.75, "market": 0.25, "rates": 0.20}),
    ("VCH5", "Valmer high-yield credit index, 5-year", "credit", "VLM", 100.0, 0.0045,
     {"credit": 0.70, "market": 0.45}),
    ("TCI5", "Tezar investment-grade credit index, 5-year", "credit", "TZP", 100.0, 0.0025,
     {"credit": 0.65, "market": 0.25, "rates": 0.30}),
    ("TCH5", "Tezar high-yield credit index, 5-year", "credit", "TZP", 100.0, 0.005,
     {"credit": 0.60, "market": 0.45}),
)
_DEMO_LATE_LISTINGS = {"MRBX": 3, "TCH5": 2}  # symbol -> listed after 1/n of the range
_DEMO_HOLIDAYS = ((1, 1), (3, 14), (8, 2), (12, 25), (12, 26))  # fictional Kordan calendar
_DEMO_MIN_TRADING_DAYS = 400


def demo_hedge_pairs() -> list[tuple[str, str]]:
    """Pairs the fictional desk holds against each other (both legs in the demo)."""
    return [
        ("KLV", "DUNQ"),
        ("OLM1", "OLM2"),
        ("TEZ05", "TEZ10"),
        ("KCI5", "VCI5"),
        ("SARN", "KCH5"),
    ]


def demo_holidays(start: date, end: date) -> tuple[date, ...]:
    """The fictional Kordan exchange holidays between two dates (weekends not moved)."""
    return tuple(
        date(year, month, day)
        for year in range(start.year, end.year + 1)
        for month, day in _DEMO_HOLIDAYS
        if start <= date(year, month, day) <= end
    )


def demo_scenario(start: date, end: date, seed: int = 7) -> Scenario:
    """The fictional 30-instrument desk with one episode of every kind near ``end``.

    Episodes are placed by trading days counted back from the last trading day, all
    within its last ~330 (about 16 months): a stale currency, a flipped bond future and
    a bad tick well before the end, a second (missing-close) stale stretch, a credit
    stress that ended five trading days before the end, and a hedge-pair decouple that
    runs for the last 40 trading days. The range must hold at least 400 trading days.
    """
    holidays = demo_holidays(start, end)
    days = trading_days(start, end, holidays)
    if len(days) < _DEMO_MIN_TRADING_DAYS:
        raise ConfigError(
            f"demo range {start}..{end} holds {len(days)} trading days; "
            f"needs >= {_DEMO_MIN_TRADING_DAYS}"
        )

    def back(n: int) -> date:
        """The trading day n days before the last one (back(0) is the last)."""
        return days[-1 - n].date()

    instruments = tuple(
        InstrumentSpec(
            symbol=symbol, name=name, group=group, currency=currency, start_price=price,
            vol=vol, loadings=dict(loadings),
            first_date=(
                days[len(days) // _DEMO_LATE_LISTINGS[symbol]].date()
                if symbol in _DEMO_LATE_LISTINGS else None
            ),
        )
        for symbol, name, group, currency, price, vol, loadings in _DEMO_INSTRUMENTS
    )
    episodes = (
        Episode(
            kind="stale", start=back(329), end=back(320), symbols=("ZLFKRD",),
            description=(
                "The Zelm franc feed freezes: for ten trading days ZLFKRD repeats its last "
                "close (zero returns), then jumps to the market price."
            ),
        ),
        Episode(
            kind="flip", start=back(299), end=back(200), symbols=("TEZ10",), factor="market",
            loading_scale=-1.5,
            description=(
                "For about five months the Tezar 10-year bond future moves with equities "
                "instead of against them: its loading on the market factor turns from -0.40 "
                "to +0.60, so its correlation with the equities turns from about -0.2 to "
                "about +0.35."
            ),
        ),
        Episode(
            kind="bad_tick", start=back(149), end=back(149), symbols=("GSV1",),
            tick_multiplier=10.0,
            description=(
                "One bad print: the Gasvane natural gas close is recorded ten times too "
                "high for a single day; the next close is right again."
            ),
        ),
        Episode(
            kind="stale", start=back(89), end=back(84), symbols=("PVLKRD",),
            stale_mode="missing",
            description="The Pavolen lira has no close at all for six trading days.",
        ),
        Episode(
            kind="stress", start=back(29), end=back(5), group="credit", common_weight=0.65,
            vol_scale=1.8,
            description=(
                "A credit scare: for 25 trading days a common shock carrying 65% of the "
                "variance hits every credit index, volatility is 1.8 times normal and the "
                "group's average pairwise correlation jumps from about 0.6 to above 0.8. "
                "It ended five trading days before the last day."
            ),
        ),
        Episode(
            kind="decouple", start=back(39), end=back(0), symbols=("KLV", "DUNQ"),
            description=(
                "The KLV / DUNQ hedge breaks: for the last 40 trading days (about two months) "
                "each trades on its own news with no factor exposure, so their correlation, "
                "normally about 0.77, falls to about zero."
            ),
        ),
    )
    return Scenario(
        instruments=instruments,
        factors=DEMO_FACTORS,
        start=start,
        end=end,
        seed=seed,
        episodes=episodes,
        holidays=holidays,
    )
