"""What a synthetic desk is made of: instruments, factor loadings, GARCH volatility,
planted episodes and the scenario that holds them (value objects, checked at construction).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import date
from typing import Literal

import pandas as pd

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


SHOCK_KINDS = frozenset({"decouple", "stress", "flip", "shift"})


_DEFAULT_LOADING_SCALE = {"decouple": 0.0, "flip": -1.0}


UNIT_TOLERANCE = 1e-12


def is_finite_number(value: float) -> bool:
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
        if not is_finite_number(self.alpha) or self.alpha < 0:
            raise ConfigError(f"garch alpha must be >= 0, got {self.alpha!r}")
        if not is_finite_number(self.beta) or self.beta < 0:
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
        if not is_finite_number(self.start_price) or self.start_price <= 0:
            raise ConfigError(
                f"instrument {self.symbol} start_price must be > 0, got {self.start_price!r}"
            )
        if not is_finite_number(self.vol) or not 0 < self.vol <= 0.2:
            raise ConfigError(f"instrument {self.symbol} vol must be in (0, 0.2], got {self.vol!r}")
        if not all(is_finite_number(v) for v in self.loadings.values()):
            raise ConfigError(
                f"instrument {self.symbol} loadings must be finite, got {self.loadings!r}"
            )
        total = sum(v * v for v in self.loadings.values())
        if total > 1 + UNIT_TOLERANCE:
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
        if not is_finite_number(self.vol_scale) or self.vol_scale <= 0:
            raise ConfigError(f"{label}: vol_scale must be > 0, got {self.vol_scale!r}")
        if self.loading_scale is not None:
            if self.kind not in _DEFAULT_LOADING_SCALE:
                raise ConfigError(f"{label}: loading_scale applies to decouple and flip only")
            if not is_finite_number(self.loading_scale):
                raise ConfigError(
                    f"{label}: loading_scale must be finite, got {self.loading_scale!r}"
                )
        if self.kind == "flip" and not self.factor:
            raise ConfigError(f"{label}: flip needs the factor whose loading changes")
        if self.kind == "stress" and not (
            is_finite_number(self.common_weight) and 0 < self.common_weight < 1
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
            if not is_finite_number(self.tick_multiplier) or self.tick_multiplier <= 0 or (
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
        if not is_finite_number(self.missing_rate) or not 0 <= self.missing_rate < 0.5:
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
