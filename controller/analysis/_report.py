"""The analysis as figures and as one self-contained HTML report.

Rules of this module
--------------------
- The report is one file: figures are embedded as base64 PNG, styles inline, no scripts and
  no links to anything outside it, so it can be mailed or archived with the data.
- Every piece of text that comes from the run log (chamber and phase names, the protocol and
  rig text, alarm codes, end reasons, notes) passes through :func:`html.escape`.
- Provenance comes first: the log file, run id, start and end, the protocol's SHA-256, the
  rig's name, the squall version that wrote the log and the one that analysed it, and every
  setting of the analysis.
"""

from __future__ import annotations

import base64
import html
import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from controller.plots._analysis import (
    MAX_PANELS,
    figure_png,
    render_o2_traces,
    render_temperature_response,
    render_tracking,
)

from ._export import rig_name, windows_with_rates
from ._log import Analysis
from ._response import response_points

__all__ = ["analysis_figures", "analysis_images", "report_html", "write_report"]

_STYLE = """
body { font-family: system-ui, sans-serif; color: #222; max-width: 72rem; margin: 2rem auto;
       padding: 0 1rem; line-height: 1.4; }
h1 { font-size: 1.5rem; } h2 { font-size: 1.2rem; margin-top: 2rem;
     border-bottom: 1px solid #ccc; } h3 { font-size: 1rem; }
table { border-collapse: collapse; font-size: 0.8rem; margin: 0.5rem 0 1rem; }
th, td { border: 1px solid #ddd; padding: 0.15rem 0.4rem; text-align: right; }
th { background: #f2efe6; } td.text, th.text { text-align: left; }
pre { background: #f7f7f7; padding: 0.6rem; overflow-x: auto; font-size: 0.8rem; }
img { max-width: 100%; height: auto; }
.notes li { color: #7a3b00; }
"""


def _sample_chambers(analysis: Analysis) -> list[str]:
    blank = analysis.settings.blank
    return [str(c) for c in analysis.chambers["chamber"] if c != blank]


def analysis_figures(analysis: Analysis) -> list[tuple[str, Figure]]:
    """Every figure of an analysis with a file-name stem.

    Parameters
    ----------
    analysis
        A finished analysis.

    Returns
    -------
    list of (name, Figure)
        ``o2-traces`` (one figure per :data:`~controller.plots._analysis.MAX_PANELS`
        chambers, numbered when there are several), ``temperature-response`` and
        ``temperature-tracking`` (likewise paged).
    """
    chambers = [str(c) for c in analysis.chambers["chamber"]]
    pages = [chambers[i : i + MAX_PANELS] for i in range(0, max(len(chambers), 1), MAX_PANELS)]
    out: list[tuple[str, Figure]] = []
    for k, page in enumerate(pages):
        suffix = f"-{k + 1}" if len(pages) > 1 else ""
        traces = render_o2_traces(analysis.traces, analysis.windows, page)
        out.append((f"o2-traces{suffix}", traces))
    points = response_points(
        analysis.pairs, analysis.respiration, analysis.groups, analysis.settings.par_level_rel
    )
    units = [g.name for g in analysis.groups] or _sample_chambers(analysis)
    units = [u for u in units if (points["unit"] == u).any()] if not points.empty else []
    out.append(
        (
            "temperature-response",
            render_temperature_response(
                points, analysis.temperature_fits, analysis.crossings, units
            ),
        )
    )
    for k, page in enumerate(pages):
        suffix = f"-{k + 1}" if len(pages) > 1 else ""
        out.append((f"temperature-tracking{suffix}", render_tracking(analysis.traces, page)))
    return out


def analysis_images(analysis: Analysis) -> list[tuple[str, bytes]]:
    """Every figure of :func:`analysis_figures` rendered as PNG bytes.

    Parameters
    ----------
    analysis
        A finished analysis.

    Returns
    -------
    list of (name, bytes)
        File-name stem and PNG data of each figure.
    """
    return [(name, figure_png(fig)) for name, fig in analysis_figures(analysis)]


def _cell(value: object) -> tuple[str, bool]:
    """Escaped text of a table cell and whether it is text (left-aligned)."""
    if value is None or value is pd.NA or value is pd.NaT:
        return "–", False
    if isinstance(value, pd.Timestamp):
        return html.escape(value.strftime("%Y-%m-%d %H:%M UTC")), True
    if isinstance(value, (bool, np.bool_)):
        return ("yes" if value else "no"), True
    if isinstance(value, (int, np.integer)):
        return str(int(value)), False
    if isinstance(value, (float, np.floating)):
        number = float(value)
        return ("–" if not math.isfinite(number) else f"{number:.4g}"), False
    return html.escape(str(value)), True


def _table(frame: pd.DataFrame, columns: Sequence[str]) -> str:
    """An HTML table of some columns of a frame, every cell escaped."""
    columns = [c for c in columns if c in frame.columns]
    if frame.empty or not columns:
        return "<p>None.</p>"
    head = "".join(f"<th>{html.escape(c)}</th>" for c in columns)
    rows = []
    for record in frame[columns].itertuples(index=False, name=None):
        cells = []
        for value in record:
            text, is_text = _cell(value)
            cells.append(f'<td class="text">{text}</td>' if is_text else f"<td>{text}</td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>"


def _image(png: bytes, alt: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    return f'<p><img alt="{html.escape(alt)}" src="data:image/png;base64,{data}"></p>'


def _provenance(analysis: Analysis) -> str:
    info = analysis.info
    meta = info.meta
    end = info.end
    ended = (
        "not finished (interrupted or still running)"
        if end is None
        else f"{pd.Timestamp(end.end_utc_s, unit='s', tz='UTC'):%Y-%m-%d %H:%M:%S} UTC "
        f"({end.end_reason.value})"
    )
    rows = [
        ("Run log", str(analysis.log_path)),
        ("Run id", meta.run_id),
        ("Start", f"{meta.start_time:%Y-%m-%d %H:%M:%S} UTC"),
        ("End", ended),
        ("Clock", meta.clock_kind.value),
        ("Protocol SHA-256", meta.protocol_sha256),
        ("Rig", rig_name(meta.rig_text) or "(unnamed)"),
        ("Log written by squall", meta.software_version),
        ("Analysed by squall", analysis.software_version),
        ("Samples", f"{info.samples} rows, {info.sessions} session(s)"),
    ]
    rows += [(f"setting {k}", str(v)) for k, v in analysis.settings.as_dict().items()]
    body = "".join(
        f'<tr><th class="text">{html.escape(k)}</th><td class="text">{html.escape(v)}</td></tr>'
        for k, v in rows
    )
    return f"<table>{body}</table>"


_WINDOW_COLUMNS = (
    "window", "chamber", "light", "phase", "start_time", "end_reason", "n", "span_min",
    "slope_umol_l_h", "slope_se_umol_l_h", "r2", "flux_umol_m2_h", "temperature_c",
    "par", "gpp_umol_m2_h", "flags",
)  # fmt: skip
_QUALITY_COLUMNS = (
    "chamber", "phase", "start_time", "hours", "temperature_mean_c",
    "temperature_setpoint_mean_c", "temperature_sd_c", "temperature_rms_c",
    "temperature_max_abs_c", "temperature_outside_min", "par_rms", "flow_rms_cm_s",
    "alarms", "trips", "gaps", "gap_min", "windows", "flagged_windows",
)  # fmt: skip
_FIT_COLUMNS = (
    "unit", "rate", "par_level", "n", "n_temperatures", "t_min_c", "t_max_c", "ea_ev",
    "ea_ci_low_ev", "ea_ci_high_ev", "q10", "q10_from_c", "q10_to_c", "rate_ref_umol_m2_h",
    "r2", "note",
)  # fmt: skip


def report_html(analysis: Analysis, images: Sequence[tuple[str, bytes]] | None = None) -> str:
    """The self-contained HTML report of an analysis.

    Parameters
    ----------
    analysis
        A finished analysis.
    images
        The figures as :func:`analysis_images` returns them (rendered here when None).

    Returns
    -------
    str
        An HTML5 document (UTF-8 text).
    """
    meta = analysis.info.meta
    figures = dict(analysis_images(analysis) if images is None else images)
    notes = "".join(f"<li>{html.escape(n)}</li>" for n in analysis.notes)
    groups = "".join(
        f"<li>{html.escape(g.name)} ({html.escape(g.role)}): "
        f"{html.escape(', '.join(g.chambers))}</li>"
        for g in analysis.groups
    )
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>squall analysis: {html.escape(meta.run_id)}</title>",
        f"<style>{_STYLE}</style></head><body>",
        f"<h1>Run analysis: {html.escape(meta.run_id)}</h1>",
        "<h2>Provenance</h2>",
        _provenance(analysis),
    ]
    if notes:
        parts.append(f'<ul class="notes">{notes}</ul>')
    if groups:
        parts.append(f"<h3>Groups</h3><ul>{groups}</ul>")
    parts += ["<h2>Closed windows and metabolism</h2>"]
    parts += [_image(fig, name) for name, fig in figures.items() if name.startswith("o2-")]
    parts += [
        _table(windows_with_rates(analysis), _WINDOW_COLUMNS),
        "<h3>Daily metabolism (mmol O<sub>2</sub> m<sup>-2</sup> d<sup>-1</sup>)</h3>",
        _table(analysis.daily, list(analysis.daily.columns)),
        "<h2>Temperature and light response</h2>",
        _image(figures["temperature-response"], "rates against temperature"),
        "<h3>Boltzmann–Arrhenius fits</h3>",
        _table(analysis.temperature_fits, _FIT_COLUMNS),
        "<h3>Crossing temperatures (R overtakes GPP)</h3>",
        _table(analysis.crossings, list(analysis.crossings.columns)),
        "<h3>Light response (Jassby &amp; Platt)</h3>",
        _table(analysis.light_fits, list(analysis.light_fits.columns)),
        "<h3>Treatment minus control</h3>",
        _table(analysis.differences, list(analysis.differences.columns)),
        "<h2>Run quality: achieved versus programmed</h2>",
    ]
    parts += [_image(f, name) for name, f in figures.items() if name.startswith("temperature-t")]
    parts += [
        _table(analysis.quality, _QUALITY_COLUMNS),
        "<h2>Protocol</h2>",
        f"<pre>{html.escape(meta.protocol_text)}</pre>",
        "<details><summary>Rig file as run</summary>",
        f"<pre>{html.escape(meta.rig_text)}</pre></details>",
        "</body></html>",
    ]
    return "\n".join(parts) + "\n"


def write_report(
    analysis: Analysis, path: str | Path, images: Sequence[tuple[str, bytes]] | None = None
) -> Path:
    """Write :func:`report_html` to a file.

    Parameters
    ----------
    analysis
        A finished analysis.
    path
        Output file, usually ``.html`` (replaced if it exists).
    images
        The figures as :func:`analysis_images` returns them (rendered here when None).

    Returns
    -------
    Path
        The file written.
    """
    path = Path(path)
    path.write_text(report_html(analysis, images), encoding="utf-8")
    return path
