"""Closed incubation windows: gather each window's O2 readings chunk by chunk and fit them.

Rules of this module
--------------------
- Time is ``run_s``: seconds since the run's start in UTC (not the clock time ``t_s``, which
  restarts when a run is resumed), on the samples and on the windows alike.
- A reading belongs to a window when it is the window's chamber's, its time lies in
  ``[start_s + settle_s, end_s)``, the sample says the incubation was ``closed`` and its O2
  is a number. Readings before the settling time, after the chamber opened again, or taken
  while flushing are never fitted.
- A window's phase is the protocol phase of its chamber's first sample inside it (settling
  or not), so even a window with nothing to fit is counted in its phase.
- Pure: frames in, frames out; the run log is read elsewhere (:mod:`._log`).
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
import numpy.typing as npt
import pandas as pd

from ._regression import SlopeSums, fit_sums

__all__ = ["WINDOW_INPUT_COLUMNS", "WindowAccumulator", "group_rows", "window_fits"]

F = npt.NDArray[np.float64]

WINDOW_INPUT_COLUMNS = (
    "run_s",
    "chamber",
    "phase",
    "temperature_c",
    "temperature_setpoint_c",
    "par",
    "par_setpoint",
    "o2_umol_l",
    "o2_sat_pct",
    "incubation",
)
"""Sample columns the window fits read (``run_s`` in s since the run's start)."""

_MEANS = ("temperature_c", "temperature_setpoint_c", "par", "par_setpoint")


def group_rows(labels: pd.Series) -> Iterator[tuple[str, npt.NDArray[np.intp]]]:
    """Row positions of each label, in row order within each label.

    Parameters
    ----------
    labels
        Text or categorical labels (e.g. chamber ids), one per row.

    Yields
    ------
    (label, positions)
        A label present in ``labels`` and the positions of its rows, ascending.
    """
    codes, uniques = pd.factorize(labels, sort=False)
    if len(codes) == 0:
        return
    order = np.argsort(codes, kind="stable")
    bounds = np.flatnonzero(np.diff(codes[order])) + 1
    for part in np.split(order, bounds):
        if len(part) and codes[part[0]] >= 0:
            yield str(uniques[codes[part[0]]]), part


class WindowAccumulator:
    """Running fit inputs of every closed window of a run.

    Parameters
    ----------
    windows
        One row per window with columns ``chamber``, ``light`` (light/dark), ``start_s`` and
        ``end_s`` (s since the run's start) and ``end_reason``; its index identifies the
        window in the result.
    settle_s
        Settling time skipped at the start of each window, s.
    """

    def __init__(self, windows: pd.DataFrame, settle_s: float) -> None:
        self._windows = windows.reset_index(drop=False).rename(columns={"index": "window"})
        size = len(self._windows)
        start = self._windows["start_s"].to_numpy(dtype=float)
        end = self._windows["end_s"].to_numpy(dtype=float)
        self._fit_start = start + float(settle_s)
        self._end = end
        self._mid = 0.5 * (self._fit_start + np.maximum(end, self._fit_start))
        self._sums = SlopeSums(size)
        self._y0 = np.full(size, np.nan)
        self._first = np.full(size, np.nan)
        self._last = np.full(size, np.nan)
        self._sat_min = np.full(size, np.nan)
        self._sat_max = np.full(size, np.nan)
        self._mean_sums = {name: np.zeros((2, size)) for name in _MEANS}
        self._phase: list[str | None] = [None] * size
        self._by_chamber: dict[str, tuple[npt.NDArray[np.intp], F, F]] = {}
        chambers = self._windows["chamber"].astype(str).to_numpy()
        for chamber in dict.fromkeys(chambers):
            idx = np.flatnonzero(chambers == chamber)
            idx = idx[np.argsort(self._fit_start[idx], kind="stable")]
            self._by_chamber[chamber] = (idx, self._fit_start[idx], self._end[idx])
        self._start = start
        self._unphased = size

    def update(self, samples: pd.DataFrame) -> None:
        """Add a chunk of samples (rows in time order within each chamber).

        Parameters
        ----------
        samples
            Columns :data:`WINDOW_INPUT_COLUMNS` (``run_s`` in s, O2 in µmol L⁻¹ and % air
            saturation, temperature in °C, PAR in µmol photons m⁻² s⁻¹).
        """
        if not self._by_chamber or samples.empty:
            return
        run_s = samples["run_s"].to_numpy(dtype=float)
        o2 = samples["o2_umol_l"].to_numpy(dtype=float)
        closed = (samples["incubation"] == "closed").to_numpy(dtype=bool, na_value=False)
        usable = closed & np.isfinite(o2)
        picked_rows: list[npt.NDArray[np.intp]] = []
        picked_windows: list[npt.NDArray[np.intp]] = []
        for chamber, rows in group_rows(samples["chamber"]):
            found = self._by_chamber.get(chamber)
            if found is None:
                continue
            if self._unphased:
                self._note_phases(samples, rows, found[0])
            rows = rows[usable[rows]]
            if len(rows) == 0:
                continue
            ids, starts, ends = found
            t = run_s[rows]
            k = np.searchsorted(starts, t, side="right") - 1
            inside = k >= 0
            inside[inside] &= t[inside] < ends[k[inside]]
            if inside.any():
                picked_rows.append(rows[inside])
                picked_windows.append(ids[k[inside]])
        if picked_rows:
            self._add(samples, np.concatenate(picked_rows), np.concatenate(picked_windows))

    def _note_phases(
        self, samples: pd.DataFrame, rows: npt.NDArray[np.intp], ids: npt.NDArray[np.intp]
    ) -> None:
        """Give windows still without a phase the phase of their first sample (any state)."""
        t = samples["run_s"].to_numpy(dtype=float)[rows]
        starts = self._start[ids]
        k = np.searchsorted(starts, t, side="right") - 1
        inside = k >= 0
        inside[inside] &= t[inside] < self._end[ids[k[inside]]]
        if not inside.any():
            return
        win = ids[k[inside]]
        firsts, first_pos = np.unique(win, return_index=True)
        if all(self._phase[w] is not None for w in firsts):
            return
        codes, names = pd.factorize(samples["phase"])
        for w, row in zip(firsts, rows[inside][first_pos], strict=True):
            if self._phase[w] is None and codes[row] >= 0:
                self._phase[w] = str(names[codes[row]])
                self._unphased -= 1

    def _add(
        self, samples: pd.DataFrame, rows: npt.NDArray[np.intp], win: npt.NDArray[np.intp]
    ) -> None:
        """Add the readings at ``rows`` of a chunk to windows ``win`` (time-ordered per window)."""
        t = samples["run_s"].to_numpy(dtype=float)[rows]
        y = samples["o2_umol_l"].to_numpy(dtype=float)[rows]
        firsts, first_pos = np.unique(win, return_index=True)
        fresh = np.isnan(self._y0[firsts])
        self._y0[firsts[fresh]] = y[first_pos[fresh]]
        self._sums.add(win, (t - self._mid[win]) / 3600.0, y - self._y0[win])
        np.fmin.at(self._first, win, t)
        np.fmax.at(self._last, win, t)
        sat = samples["o2_sat_pct"].to_numpy(dtype=float)[rows]
        np.fmin.at(self._sat_min, win, sat)
        np.fmax.at(self._sat_max, win, sat)
        size = len(self._y0)
        for name, acc in self._mean_sums.items():
            values = samples[name].to_numpy(dtype=float)[rows]
            ok = np.isfinite(values)
            acc[0] += np.bincount(win[ok], weights=values[ok], minlength=size)
            acc[1] += np.bincount(win[ok], minlength=size)

    def table(self) -> pd.DataFrame:
        """One row per window with its straight-line fit (before flags and fluxes).

        Returns
        -------
        pandas.DataFrame
            Columns ``window`` (the input's index), ``chamber``, ``light``, ``phase``,
            ``start_s``, ``end_s``, ``fit_start_s``, ``fit_end_s`` (first and last fitted
            reading; s since the run's start), ``end_reason``, ``n``, ``span_min``,
            ``slope_umol_l_h``, ``slope_se_umol_l_h``, ``r2``, ``quad_umol_l_h2``,
            ``quad_p``, ``slope_change_frac`` (|2c·span|/|b|), ``mid_s`` and
            ``o2_mid_umol_l`` (the fitted line passes through O2 = o2_mid at run_s = mid_s,
            µmol L⁻¹), ``o2_sat_min_pct``, ``o2_sat_max_pct`` and the means of
            ``temperature_c``, ``temperature_setpoint_c`` (°C), ``par`` and ``par_setpoint``
            (µmol photons m⁻² s⁻¹) over the fitted readings.
        """
        fit = fit_sums(self._sums.sums)
        span_h = (self._last - self._first) / 3600.0
        with np.errstate(divide="ignore", invalid="ignore"):
            change = np.abs(2.0 * fit.quad_umol_l_h2 * span_h) / np.abs(fit.slope_umol_l_h)
            o2_mid = self._y0 + fit.mean_y_umol_l - fit.slope_umol_l_h * fit.mean_x_h
        w = self._windows
        out = pd.DataFrame(
            {
                "window": w["window"].to_numpy(),
                "chamber": w["chamber"].astype(str).to_numpy(),
                "light": w["light"].astype(str).to_numpy(),
                "phase": pd.array(self._phase, dtype="string"),
                "start_s": w["start_s"].to_numpy(dtype=float),
                "end_s": w["end_s"].to_numpy(dtype=float),
                "fit_start_s": self._first,
                "fit_end_s": self._last,
                "end_reason": w["end_reason"].astype(str).to_numpy(),
                "n": fit.n,
                "span_min": span_h * 60.0,
                "slope_umol_l_h": fit.slope_umol_l_h,
                "slope_se_umol_l_h": fit.slope_se_umol_l_h,
                "r2": fit.r2,
                "quad_umol_l_h2": fit.quad_umol_l_h2,
                "quad_p": fit.quad_p,
                "slope_change_frac": change,
                "mid_s": self._mid,
                "o2_mid_umol_l": o2_mid,
                "o2_sat_min_pct": self._sat_min,
                "o2_sat_max_pct": self._sat_max,
            }
        )
        for name, acc in self._mean_sums.items():
            with np.errstate(divide="ignore", invalid="ignore"):
                out[name] = np.where(acc[1] > 0, acc[0] / acc[1], np.nan)
        return out


def window_fits(samples: pd.DataFrame, windows: pd.DataFrame, settle_s: float) -> pd.DataFrame:
    """Fit every closed window of a run from one frame of samples.

    Parameters
    ----------
    samples
        Columns :data:`WINDOW_INPUT_COLUMNS`, time-ordered within each chamber.
    windows
        Columns ``chamber``, ``light``, ``start_s``, ``end_s`` (s since the run's start),
        ``end_reason``.
    settle_s
        Settling time skipped at the start of each window, s.

    Returns
    -------
    pandas.DataFrame
        As :meth:`WindowAccumulator.table`.
    """
    acc = WindowAccumulator(windows, settle_s)
    acc.update(samples)
    return acc.table()
