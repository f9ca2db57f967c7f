"""Invented daily temperature series with injected warm and cold events (test data only)."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["Injected", "Series", "make_series", "write_series_csv"]


@dataclass(frozen=True)
class Injected:
    """One injected event: a box anomaly of ``size_c`` °C on ``days`` days from ``start``."""

    start: dt.date
    days: int
    size_c: float

    @property
    def end(self) -> dt.date:
        """Last day of the box (inclusive)."""
        return self.start + dt.timedelta(days=self.days - 1)


@dataclass(frozen=True)
class Series:
    """A continuous daily series (one value per calendar day, NaN where missing)."""

    dates: list[dt.date]
    temps: np.ndarray
    injected: list[Injected]


def make_series(
    seed: int,
    first_year: int = 1981,
    last_year: int = 2020,
    *,
    n_events: int = 14,
    size_c: float = 3.5,
    cold: bool = False,
    at_ends: bool = False,
    missing: int = 0,
) -> Series:
    """Seasonal cycle + AR(1) red noise + box events of known start and length.

    Parameters
    ----------
    seed
        Seed of numpy's default generator, so each series is the same every run.
    first_year, last_year
        Calendar years covered, inclusive.
    n_events
        Number of boxes injected (one per ~third of the years, never overlapping).
    size_c
        Box anomaly, °C (negated when ``cold``).
    cold
        Inject cold boxes instead of warm ones.
    at_ends
        Also put boxes on the first and last 8 days of the series.
    missing
        Number of single days, away from the boxes, set to NaN.
    """
    rng = np.random.default_rng(seed)
    start = dt.date(first_year, 1, 1)
    n = (dt.date(last_year, 12, 31) - start).days + 1
    dates = [start + dt.timedelta(days=i) for i in range(n)]
    t = np.arange(n, dtype=float)
    seasonal = 14.0 + 5.0 * np.sin(2 * np.pi * (t - 110.0) / 365.25)
    seasonal += 0.8 * np.sin(4 * np.pi * (t - 30.0) / 365.25)
    phi, sigma = 0.85, 0.7
    shocks = rng.normal(0.0, sigma * np.sqrt(1 - phi**2), n)
    noise = np.empty(n)
    noise[0] = rng.normal(0.0, sigma)
    for i in range(1, n):
        noise[i] = phi * noise[i - 1] + shocks[i]
    temps = seasonal + noise
    sign = -1.0 if cold else 1.0
    slots = np.linspace(60, n - 90, n_events).astype(int)
    injected: list[Injected] = []
    for slot in slots:
        first = int(slot + rng.integers(0, 30))
        length = int(rng.integers(6, 31))
        temps[first : first + length] += sign * size_c
        injected.append(Injected(dates[first], length, sign * size_c))
    if at_ends:
        for first in (0, n - 8):
            temps[first : first + 8] += sign * size_c
            injected.append(Injected(dates[first], 8, sign * size_c))
    if missing:
        busy = np.zeros(n, dtype=bool)
        for event in injected:
            i = (event.start - start).days
            busy[max(i - 3, 0) : i + event.days + 3] = True
        free = np.flatnonzero(~busy)
        temps[rng.choice(free, size=missing, replace=False)] = np.nan
    return Series(dates, temps, sorted(injected, key=lambda e: e.start))


def write_series_csv(series: Series, path: Path) -> Path:
    """Write ``date,temperature_c`` rows (empty cell for a missing day); return the path."""
    lines = ["# invented test series", "date,temperature_c"]
    for day, value in zip(series.dates, series.temps, strict=True):
        lines.append(f"{day.isoformat()},{'' if np.isnan(value) else f'{value:.4f}'}")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path
