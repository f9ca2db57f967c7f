"""Write the invented daily sea-surface temperature series of "Saltmarrow Lagoon (fictional)".

INVENTED DEMO DATA. Saltmarrow Lagoon does not exist and this series was measured nowhere:
it is a seasonal cycle plus red noise plus a few injected warm and cold spells, made so that
the example protocols have a site series to compute a climatology and thresholds from
(Hobday et al. 2016 method). Do not use it for science.

The output is reproducible: a fixed seed, and numbers rounded to 0.01 °C. Run from anywhere::

    python protocols/data/make_series.py            # rewrites saltmarrow-sst.csv beside it
    python protocols/data/make_series.py OUT.csv    # or writes elsewhere
"""

from __future__ import annotations

import sys
from datetime import date, timedelta
from pathlib import Path

import numpy as np

__all__ = ["FIRST_DAY", "LAST_DAY", "SEED", "make_series", "write_series"]

SEED = 20270720
"""Seed of the random generator; change it and every example's numbers change."""

FIRST_DAY = date(1991, 1, 1)
LAST_DAY = date(2023, 12, 31)

MEAN_C = 15.2
"""Annual mean water temperature, °C (invented)."""
AMPLITUDE_C = 5.4
"""Half the seasonal range, °C (invented)."""
WARMEST_DOY = 218
"""Day of year of the seasonal maximum (early August), day."""
TREND_C_PER_YEAR = 0.02
"""Slow warming, °C per year (invented)."""
NOISE_SD_C = 1.1
"""Standard deviation of the day-to-day anomaly, °C."""
NOISE_LAG1 = 0.85
"""Lag-one autocorrelation of the anomaly (red noise), dimensionless."""

# (first day, length in days, peak anomaly °C): invented spells injected into the noise.
SPELLS: tuple[tuple[date, int, float], ...] = (
    (date(1994, 7, 28), 12, 2.8),
    (date(2003, 8, 2), 21, 4.1),
    (date(2010, 1, 14), 15, -3.2),
    (date(2015, 6, 30), 9, 2.4),
    (date(2018, 7, 20), 26, 3.6),
    (date(2022, 8, 5), 17, 3.9),
)


def make_series() -> tuple[list[date], np.ndarray]:
    """Build the invented series.

    Returns
    -------
    tuple of (list of date, numpy.ndarray)
        The days and the water temperature on each, °C, rounded to 0.01 °C.
    """
    rng = np.random.default_rng(SEED)
    days = [FIRST_DAY + timedelta(days=k) for k in range((LAST_DAY - FIRST_DAY).days + 1)]
    doy = np.array([d.timetuple().tm_yday for d in days], dtype=float)
    years = np.array([(d - FIRST_DAY).days / 365.25 for d in days])
    seasonal = MEAN_C + AMPLITUDE_C * np.cos(2 * np.pi * (doy - WARMEST_DOY) / 365.25)
    noise = np.empty(len(days))
    innovation_sd = NOISE_SD_C * np.sqrt(1 - NOISE_LAG1**2)
    noise[0] = rng.normal(0.0, NOISE_SD_C)
    for k in range(1, len(days)):
        noise[k] = NOISE_LAG1 * noise[k - 1] + rng.normal(0.0, innovation_sd)
    spells = np.zeros(len(days))
    for start, length, peak in SPELLS:
        k0 = (start - FIRST_DAY).days
        shape = np.sin(np.linspace(0.0, np.pi, length)) ** 0.5
        spells[k0 : k0 + length] += peak * shape
    temperature = seasonal + TREND_C_PER_YEAR * years + noise + spells
    return days, np.round(temperature, 2)


def write_series(path: Path) -> None:
    """Write the series as CSV (``date,temperature_c``) with a header saying it is invented.

    Parameters
    ----------
    path
        Output file.
    """
    days, temperature = make_series()
    lines = [
        "# INVENTED DEMO DATA: daily water temperature of Saltmarrow Lagoon (fictional).",
        "# Synthetic (seasonal cycle + red noise + injected spells), made by make_series.py",
        f"# with seed {SEED}. Not a measurement of any real place; do not use for science.",
        "date,temperature_c",
    ]
    lines += [f"{d.isoformat()},{t:.2f}" for d, t in zip(days, temperature, strict=True)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


if __name__ == "__main__":
    target = (
        Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).with_name("saltmarrow-sst.csv")
    )
    write_series(target)
    print(f"wrote {target}")
