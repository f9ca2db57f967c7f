"""Run quality per chamber and phase: how well the chambers followed the protocol.

Rules of this module
--------------------
- Deviation = measured − setpoint, over the ticks where both are numbers. RMS, bias (mean),
  SD and maximum |deviation| are over those ticks; "time outside" counts the ticks outside
  the tolerance band times the chamber's tick period (median interval between its ticks).
- Tolerance bands: temperature ±``band_c``; PAR ±max(``band_par_pct`` % of the setpoint,
  ``band_par_floor``); flow ±``band_flow_cm_s``, judged only while the incubation is open
  (a closed chamber stops its flow on purpose).
- A data gap is an interval between two consecutive ticks of a chamber longer than
  ``gap_periods`` tick periods; its missing time is the interval minus one period. A gap is
  counted in the phase of the tick that ends it.
- Alarms: raises only (not clears or acknowledgements), in the phase the chamber was in at
  the time; an alarm of the whole rig counts for every chamber. Interlock trips are raises
  of level ``trip``.
- Samples arrive in chunks (:class:`QualityAccumulator`); the result does not depend on how
  a log is cut into chunks.
- Pure: frames in, frames out.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
import pandas as pd

from ._settings import AnalysisSettings

__all__ = ["QUALITY_INPUT_COLUMNS", "QualityAccumulator", "run_quality"]

F = npt.NDArray[np.float64]

QUALITY_INPUT_COLUMNS = (
    "run_s",
    "chamber",
    "phase",
    "temperature_c",
    "temperature_setpoint_c",
    "par",
    "par_setpoint",
    "flow_cm_s",
    "flow_setpoint_cm_s",
    "incubation",
)
"""Sample columns the quality table reads (``run_s`` in s since the run's start)."""

_VARIABLES = (
    ("temperature", "temperature_c", "temperature_setpoint_c", "_c"),
    ("par", "par", "par_setpoint", ""),
    ("flow", "flow_cm_s", "flow_setpoint_cm_s", "_cm_s"),
)
_PARTS = ("n", "sum", "sum2", "out", "msum", "ssum")
_SUM_COLUMNS = ("ticks", "light", *(f"{v[0]}_{part}" for v in _VARIABLES for part in _PARTS))


class QualityAccumulator:
    """Running setpoint-tracking statistics, gaps and light share per chamber and phase.

    Parameters
    ----------
    settings
        Tolerance bands and the gap rule.
    """

    def __init__(self, settings: AnalysisSettings) -> None:
        self._settings = settings
        self._keys: dict[tuple[str, str], int] = {}
        self._sums = np.zeros((0, len(_SUM_COLUMNS)))
        self._maxes = np.zeros((0, len(_VARIABLES)))
        self._first = np.zeros(0)
        self._last = np.zeros(0)
        self._last_s: dict[str, float] = {}
        self._period_s: dict[str, float] = {}
        self._gaps: dict[tuple[str, str], list[float]] = {}
        self._rank: dict[str, int] = {}

    def update(self, samples: pd.DataFrame) -> None:
        """Add a chunk of samples (rows in time order within each chamber).

        Parameters
        ----------
        samples
            Columns :data:`QUALITY_INPUT_COLUMNS`, units as in the run log.
        """
        if samples.empty:
            return
        s = self._settings
        chamber_codes, chambers = pd.factorize(samples["chamber"], sort=False)
        phase_codes, phases = pd.factorize(samples["phase"], sort=False, use_na_sentinel=False)
        for chamber in chambers:
            self._rank.setdefault(str(chamber), len(self._rank))
        combined = chamber_codes.astype(np.int64) * len(phases) + phase_codes
        groups, row_group = np.unique(combined, return_inverse=True)
        size = len(groups)
        run_s = samples["run_s"].to_numpy(float)
        columns: list[np.ndarray] = [
            np.ones(len(samples)),
            (samples["par_setpoint"].to_numpy(float) > 0).astype(float),
        ]
        maxes: list[np.ndarray] = []
        is_open = (samples["incubation"] == "open").to_numpy(dtype=bool, na_value=False)
        for name, measured_col, setpoint_col, _ in _VARIABLES:
            measured = samples[measured_col].to_numpy(float)
            setpoint = samples[setpoint_col].to_numpy(float)
            dev = measured - setpoint
            valid = np.isfinite(dev)
            if name == "flow":
                valid &= is_open
            if name == "par":
                band = np.maximum(s.band_par_pct / 100.0 * np.abs(setpoint), s.band_par_floor)
            elif name == "flow":
                band = np.full(len(dev), s.band_flow_cm_s)
            else:
                band = np.full(len(dev), s.band_c)
            d0 = np.where(valid, dev, 0.0)
            columns += [
                valid.astype(float),
                d0,
                d0 * d0,
                (valid & (np.abs(d0) > band)).astype(float),
                np.where(valid, measured, 0.0),
                np.where(valid, setpoint, 0.0),
            ]
            maxes.append(np.where(valid, np.abs(d0), -np.inf))
        sums = np.stack([np.bincount(row_group, weights=c, minlength=size) for c in columns], 1)
        peak = np.full((size, len(maxes)), -np.inf)
        for j, values in enumerate(maxes):
            np.maximum.at(peak[:, j], row_group, values)
        first = np.full(size, np.inf)
        last = np.full(size, -np.inf)
        np.minimum.at(first, row_group, run_s)
        np.maximum.at(last, row_group, run_s)
        keys = [(str(chambers[g // len(phases)]), str(phases[g % len(phases)])) for g in groups]
        self._merge(keys, sums, peak, first, last)
        self._find_gaps(run_s, chamber_codes, chambers, phase_codes, phases)

    def _merge(self, keys: list[tuple[str, str]], sums: F, peak: F, first: F, last: F) -> None:
        """Fold one chunk's per-group statistics into the running ones."""
        new = [k for k in keys if k not in self._keys]
        if new:
            for key in new:
                self._keys[key] = len(self._keys)
            grow = len(new)
            self._sums = np.vstack([self._sums, np.zeros((grow, self._sums.shape[1]))])
            self._maxes = np.vstack([self._maxes, np.full((grow, self._maxes.shape[1]), -np.inf)])
            self._first = np.concatenate([self._first, np.full(grow, np.inf)])
            self._last = np.concatenate([self._last, np.full(grow, -np.inf)])
        rows = np.array([self._keys[k] for k in keys], dtype=np.intp)
        self._sums[rows] += sums
        self._maxes[rows] = np.maximum(self._maxes[rows], peak)
        self._first[rows] = np.minimum(self._first[rows], first)
        self._last[rows] = np.maximum(self._last[rows], last)

    @property
    def _stats(self) -> pd.DataFrame | None:
        """Running statistics as a frame indexed by (chamber, phase); None before data."""
        if not self._keys:
            return None
        index = pd.MultiIndex.from_tuples(list(self._keys), names=["chamber", "phase"])
        frame = pd.DataFrame(self._sums, index=index, columns=list(_SUM_COLUMNS))
        for j, (name, *_rest) in enumerate(_VARIABLES):
            frame[f"{name}_max"] = np.where(
                np.isfinite(self._maxes[:, j]), self._maxes[:, j], np.nan
            )
        frame["first_s"] = self._first
        frame["last_s"] = self._last
        return frame

    def _find_gaps(
        self,
        run_s: F,
        chamber_codes: npt.NDArray[np.intp],
        chambers: pd.Index,
        phase_codes: npt.NDArray[np.intp],
        phases: pd.Index,
    ) -> None:
        order = np.argsort(chamber_codes, kind="stable")
        bounds = np.flatnonzero(np.diff(chamber_codes[order])) + 1
        for rows in np.split(order, bounds):
            if len(rows) == 0:
                continue
            chamber = str(chambers[chamber_codes[rows[0]]])
            t = run_s[rows]
            previous = self._last_s.get(chamber)
            times = t if previous is None else np.concatenate(([previous], t))
            if chamber not in self._period_s:
                steps = np.diff(times)
                steps = steps[steps > 0]
                if len(steps) == 0:
                    self._last_s[chamber] = float(t[-1])
                    continue
                self._period_s[chamber] = float(np.median(steps))
            period = self._period_s[chamber]
            steps = np.diff(times)
            offset = 0 if previous is None else 1
            for k in np.flatnonzero(steps > self._settings.gap_periods * period):
                phase = str(phases[phase_codes[rows[k + 1 - offset]]])
                self._gaps.setdefault((chamber, phase), []).append(float(steps[k] - period))
            self._last_s[chamber] = float(t[-1])

    def photoperiods(self) -> pd.DataFrame:
        """Light hours per day of each chamber and phase.

        Returns
        -------
        pandas.DataFrame
            ``chamber``, ``phase`` and ``photoperiod_h``: the share of ticks with a PAR
            setpoint above 0, times 24 h.
        """
        if self._stats is None:
            return pd.DataFrame(columns=["chamber", "phase", "photoperiod_h"])
        stats = self._stats
        out = stats.index.to_frame(index=False)
        out["photoperiod_h"] = (stats["light"] / stats["ticks"] * 24.0).to_numpy()
        return out

    def table(
        self, alarms: pd.DataFrame | None = None, windows: pd.DataFrame | None = None
    ) -> pd.DataFrame:
        """The quality table ("achieved versus programmed") per chamber and phase.

        Parameters
        ----------
        alarms
            Alarm records with ``run_s`` (s since the run's start), ``action``, ``level`` and
            ``chamber`` (None/NA for the whole rig); None for none.
        windows
            Classified windows (``chamber``, ``phase``, ``light``, ``usable``); None for none.

        Returns
        -------
        pandas.DataFrame
            One row per chamber and phase (phases in the order they began, chambers in the
            order they first appear in the log): ``chamber``,
            ``phase``, ``start_s``, ``end_s`` (s since the run's start), ``hours`` (h),
            ``ticks``, ``period_s`` (s); for temperature (``_c``, °C), PAR (µmol photons
            m⁻² s⁻¹) and flow (``_cm_s``): ``<v>_mean``, ``<v>_setpoint_mean``, ``<v>_bias``,
            ``<v>_sd``, ``<v>_rms``, ``<v>_max_abs`` (each with the unit suffix),
            ``<v>_outside_min`` (min) and ``<v>_outside_pct`` (% of judged ticks);
            ``photoperiod_h`` (h); ``alarms``, ``trips``, ``gaps``, ``gap_min`` (min),
            ``windows``, ``light_windows``, ``dark_windows``, ``flagged_windows``.
        """
        if self._stats is None:
            return pd.DataFrame()
        st = self._stats
        # phases in the order they began, chambers in the order they first appeared
        ranks = [self._rank[c] for c in st.index.get_level_values(0)]
        st = st.iloc[np.lexsort((ranks, st["first_s"].to_numpy()))]
        keys = st.index.to_frame(index=False)
        out = keys.copy()
        out["start_s"] = st["first_s"].to_numpy()
        out["end_s"] = st["last_s"].to_numpy()
        out["hours"] = (out["end_s"] - out["start_s"]) / 3600.0
        out["ticks"] = st["ticks"].to_numpy().astype(np.int64)
        period = keys["chamber"].map(self._period_s).to_numpy(dtype=float)
        out["period_s"] = period
        for name, _, _, unit in _VARIABLES:
            n = st[f"{name}_n"].to_numpy()
            with np.errstate(divide="ignore", invalid="ignore"):
                bias = st[f"{name}_sum"].to_numpy() / n
                mean_sq = st[f"{name}_sum2"].to_numpy() / n
                sd = np.sqrt(np.maximum(mean_sq - bias * bias, 0.0) * n / (n - 1))
                out[f"{name}_mean{unit}"] = st[f"{name}_msum"].to_numpy() / n
                out[f"{name}_setpoint_mean{unit}"] = st[f"{name}_ssum"].to_numpy() / n
                out[f"{name}_bias{unit}"] = bias
                out[f"{name}_sd{unit}"] = np.where(n > 1, sd, np.nan)
                out[f"{name}_rms{unit}"] = np.sqrt(mean_sq)
                out[f"{name}_max_abs{unit}"] = st[f"{name}_max"].to_numpy()
                out[f"{name}_outside_min"] = st[f"{name}_out"].to_numpy() * period / 60.0
                out[f"{name}_outside_pct"] = 100.0 * st[f"{name}_out"].to_numpy() / n
        out["photoperiod_h"] = (st["light"] / st["ticks"] * 24.0).to_numpy()
        out["alarms"], out["trips"] = _alarm_counts(keys, st, alarms)
        pairs = zip(keys["chamber"], keys["phase"], strict=True)
        gaps = [self._gaps.get((c, p), []) for c, p in pairs]
        out["gaps"] = [len(g) for g in gaps]
        out["gap_min"] = [sum(g) / 60.0 for g in gaps]
        for column, values in _window_counts(keys, windows).items():
            out[column] = values
        return out


def _alarm_counts(
    keys: pd.DataFrame, stats: pd.DataFrame, alarms: pd.DataFrame | None
) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.int64]]:
    """Alarm raises and interlock trips per row of ``keys`` (rows of ``stats``)."""
    counts = np.zeros(len(keys), dtype=np.int64)
    trips = np.zeros(len(keys), dtype=np.int64)
    if alarms is None or alarms.empty:
        return counts, trips
    starts = stats["first_s"].to_numpy()
    ends = stats["last_s"].to_numpy()
    chambers = keys["chamber"].to_numpy()
    raised = alarms[alarms["action"].astype(str) == "raise"]
    for alarm in raised.itertuples(index=False):
        target = getattr(alarm, "chamber", None)
        if target is None or pd.isna(target):
            targets = list(dict.fromkeys(chambers))
        else:
            targets = [str(target)]
        for chamber in targets:
            row = _phase_row(chambers, starts, ends, chamber, float(alarm.run_s))
            if row is None:
                continue
            counts[row] += 1
            trips[row] += int(str(alarm.level) == "trip")
    return counts, trips


def _phase_row(chambers: np.ndarray, starts: F, ends: F, chamber: str, t_s: float) -> int | None:
    """Row of the chamber's phase at ``t_s``: containing it, else the latest started before."""
    mine = np.flatnonzero(chambers == chamber)
    if len(mine) == 0:
        return None
    inside = mine[(starts[mine] <= t_s) & (t_s <= ends[mine])]
    if len(inside):
        return int(inside[0])
    before = mine[starts[mine] <= t_s]
    if len(before):
        return int(before[np.argmax(starts[before])])
    return int(mine[np.argmin(starts[mine])])


def _window_counts(keys: pd.DataFrame, windows: pd.DataFrame | None) -> dict[str, list[int]]:
    """Closed windows (flushes) per chamber and phase: all, light, dark and flagged."""
    names = ("windows", "light_windows", "dark_windows", "flagged_windows")
    if windows is None or windows.empty:
        return {name: [0] * len(keys) for name in names}
    w = windows.assign(
        phase=windows["phase"].astype(str),
        is_light=(windows["light"] == "light").astype(int),
        is_dark=(windows["light"] == "dark").astype(int),
        flagged=(~windows["usable"].astype(bool)).astype(int),
        one=1,
    )
    counts = w.groupby(["chamber", "phase"])[["one", "is_light", "is_dark", "flagged"]].sum()
    found = [
        counts.loc[(c, p)] if (c, p) in counts.index else None
        for c, p in zip(keys["chamber"], keys["phase"], strict=True)
    ]
    return {
        name: [0 if row is None else int(row[column]) for row in found]
        for name, column in zip(names, ("one", "is_light", "is_dark", "flagged"), strict=True)
    }


def run_quality(
    samples: pd.DataFrame,
    settings: AnalysisSettings,
    alarms: pd.DataFrame | None = None,
    windows: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """The quality table of a run from one frame of samples.

    Parameters
    ----------
    samples
        Columns :data:`QUALITY_INPUT_COLUMNS`, time-ordered within each chamber.
    settings
        Tolerance bands and the gap rule.
    alarms
        Alarm records with ``run_s`` (s), ``action``, ``level``, ``chamber``; None for none.
    windows
        Classified windows; None for none.

    Returns
    -------
    pandas.DataFrame
        As :meth:`QualityAccumulator.table`.
    """
    acc = QualityAccumulator(settings)
    acc.update(samples)
    return acc.table(alarms, windows)
