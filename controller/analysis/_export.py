"""An analysis as files: one JSON document, CSV tables.

Rules of this module
--------------------
- JSON holds every table as a list of records, numbers as numbers, NaN as ``null``, times as
  ISO 8601 UTC strings ending in ``Z``. The document names its format
  (:data:`JSON_FORMAT`); keys may be added in later versions, never renamed.
- ``--csv FILE`` writes the windows table (one row per closed window, with NCP, R and GPP
  for paired light windows) to FILE and every other table beside it as
  ``<stem>-<table>.csv``.
"""

from __future__ import annotations

import json
import math
import tomllib
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ._log import Analysis

__all__ = [
    "CSV_TABLES",
    "JSON_FORMAT",
    "analysis_json",
    "records",
    "rig_name",
    "windows_with_rates",
    "write_csv_tables",
    "write_json",
]

JSON_FORMAT = "squall-analysis/1"
"""Format tag of the JSON document."""

CSV_TABLES = (
    "daily",
    "temperature_fits",
    "crossings",
    "light_fits",
    "differences",
    "quality",
)
"""Tables written beside the windows CSV, as ``<stem>-<table>.csv``."""

_INTERNAL_WINDOW_COLUMNS = ("mid_s",)


def _iso(value: datetime | pd.Timestamp) -> str:
    stamp = pd.Timestamp(value)
    stamp = stamp.tz_localize(UTC) if stamp.tzinfo is None else stamp.tz_convert(UTC)
    return stamp.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _plain(value: Any) -> Any:
    """A JSON-ready scalar: NaN/NA → None, numpy → Python, times → ISO strings."""
    if value is None:
        return None
    if isinstance(value, (pd.Timestamp, datetime)):
        return None if pd.isna(value) else _iso(value)
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer, int)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        return None if not math.isfinite(float(value)) else float(value)
    if value is pd.NA or value is pd.NaT:
        return None
    return str(value) if not isinstance(value, (list, dict, tuple)) else value


def records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """Rows of a frame as JSON-ready dicts (column order kept).

    Parameters
    ----------
    frame
        Any result table.

    Returns
    -------
    list of dict
        One dict per row; see :func:`_plain` for the value conversions.
    """
    columns = list(frame.columns)
    return [
        {c: _plain(v) for c, v in zip(columns, row, strict=True)}
        for row in frame.itertuples(index=False, name=None)
    ]


def rig_name(rig_text: str) -> str | None:
    """The ``name`` of a rig file's text, or None when it cannot be read."""
    try:
        name = tomllib.loads(rig_text).get("name")
    except tomllib.TOMLDecodeError:
        return None
    return str(name) if isinstance(name, str) else None


def windows_with_rates(analysis: Analysis) -> pd.DataFrame:
    """The windows table with NCP, R and GPP of paired light windows (µmol O2 m⁻² h⁻¹).

    Parameters
    ----------
    analysis
        A finished analysis.

    Returns
    -------
    pandas.DataFrame
        ``analysis.windows`` plus ``dark_window``, ``ncp_umol_m2_h``, ``r_umol_m2_h``,
        ``gpp_umol_m2_h`` and ``gpp_se_umol_m2_h`` (NaN for dark and unpaired windows).
    """
    rates = analysis.pairs[
        ["light_window", "dark_window", "ncp_umol_m2_h", "r_umol_m2_h", "gpp_umol_m2_h",
         "gpp_se_umol_m2_h"]
    ].rename(columns={"light_window": "window"})  # fmt: skip
    out = analysis.windows.drop(columns=list(_INTERNAL_WINDOW_COLUMNS), errors="ignore")
    return out.merge(rates, on="window", how="left")


def analysis_json(analysis: Analysis) -> dict[str, Any]:
    """The whole analysis as a JSON-ready document.

    Parameters
    ----------
    analysis
        A finished analysis.

    Returns
    -------
    dict
        Keys ``format``, ``log``, ``run`` (id, start, end, end reason, clock, the log's
        software version, protocol SHA-256, rig name, samples, sessions), ``analysis``
        (software version, settings, rows read), ``groups``, ``chambers``, ``windows``,
        ``pairs``, ``respiration``, ``daily``, ``temperature_fits``, ``crossings``,
        ``light_fits``, ``differences``, ``quality`` and ``notes``.
    """
    info = analysis.info
    meta = info.meta
    end = info.end
    return {
        "format": JSON_FORMAT,
        "log": str(analysis.log_path),
        "run": {
            "run_id": meta.run_id,
            "start": _iso(meta.start_time),
            "end": None if end is None else _iso(datetime.fromtimestamp(end.end_utc_s, UTC)),
            "end_reason": None if end is None else end.end_reason.value,
            "finished": info.finished,
            "clock": meta.clock_kind.value,
            "software_version": meta.software_version,
            "protocol_sha256": meta.protocol_sha256,
            "rig_name": rig_name(meta.rig_text),
            "samples": info.samples,
            "sessions": info.sessions,
        },
        "analysis": {
            "software_version": analysis.software_version,
            "settings": {k: _plain(v) for k, v in analysis.settings.as_dict().items()},
            "rows_read": analysis.rows_read,
        },
        "groups": [
            {"name": g.name, "role": g.role, "chambers": list(g.chambers), "label": g.label}
            for g in analysis.groups
        ],
        "chambers": records(analysis.chambers),
        "windows": records(windows_with_rates(analysis)),
        "pairs": records(analysis.pairs),
        "respiration": records(analysis.respiration),
        "daily": records(analysis.daily),
        "temperature_fits": records(analysis.temperature_fits),
        "crossings": records(analysis.crossings),
        "light_fits": records(analysis.light_fits),
        "differences": records(analysis.differences),
        "quality": records(analysis.quality),
        "notes": list(analysis.notes),
    }


def write_json(analysis: Analysis, path: str | Path) -> Path:
    """Write :func:`analysis_json` to a file (UTF-8, indented).

    Parameters
    ----------
    analysis
        A finished analysis.
    path
        Output file (replaced if it exists).

    Returns
    -------
    Path
        The file written.
    """
    path = Path(path)
    text = json.dumps(analysis_json(analysis), indent=1, ensure_ascii=False, allow_nan=False)
    path.write_text(text + "\n", encoding="utf-8")
    return path


def _csv_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """Times as ISO strings so the CSV reads the same everywhere."""
    out = frame.copy()
    for column in out.columns:
        if isinstance(out[column].dtype, pd.DatetimeTZDtype):
            out[column] = [None if pd.isna(v) else _iso(v) for v in out[column]]
    return out


def write_csv_tables(analysis: Analysis, path: str | Path) -> list[Path]:
    """Write the windows table to ``path`` and the other tables beside it.

    Parameters
    ----------
    analysis
        A finished analysis.
    path
        The windows CSV; the other tables go to ``<stem>-<table>.csv`` in its folder
        (:data:`CSV_TABLES`). Existing files are replaced.

    Returns
    -------
    list of Path
        Every file written, the windows table first.
    """
    path = Path(path)
    written = [path]
    _csv_frame(windows_with_rates(analysis)).to_csv(path, index=False)
    for table in CSV_TABLES:
        target = path.with_name(f"{path.stem}-{table.replace('_', '-')}.csv")
        _csv_frame(getattr(analysis, table)).to_csv(target, index=False)
        written.append(target)
    return written
