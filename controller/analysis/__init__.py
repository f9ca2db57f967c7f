"""Analysis of run logs: closed-window metabolism, temperature and light responses, run quality.

- :func:`analyze_log` reads a run log in chunks and returns an :class:`Analysis` with every
  result table; it is the only part that touches a file.
- The rest are pure functions on pandas frames and arrays: O2 slopes
  (:func:`fit_o2_slope`), fluxes and flags (:func:`areal_flux`, :func:`classify_windows`),
  NCP/R/GPP pairing and daily rates (:func:`pair_windows`, :func:`daily_metabolism`),
  Boltzmann–Arrhenius fits and the crossing temperature (:func:`fit_arrhenius`,
  :func:`crossing_temperature`), the Jassby & Platt light response
  (:func:`fit_light_response`), treatment-versus-control differences
  (:func:`group_differences`) and the run-quality table (:func:`run_quality`).
- :func:`analysis_json`, :func:`write_csv_tables` and :func:`write_report` turn an
  :class:`Analysis` into files.

Names are re-exported lazily (see :mod:`controller._lazy`), so naming this package costs
nothing until an analysis runs.
"""

from typing import TYPE_CHECKING

from controller._lazy import lazy_exports

if TYPE_CHECKING:
    from ._export import (
        CSV_TABLES,
        JSON_FORMAT,
        analysis_json,
        records,
        rig_name,
        windows_with_rates,
        write_csv_tables,
        write_json,
    )
    from ._fits import (
        ArrheniusFit,
        Crossing,
        LightFit,
        crossing_temperature,
        distinct_temperatures,
        fit_arrhenius,
        fit_light_response,
        inverse_temperature_ev,
        light_levels,
    )
    from ._log import (
        READ_COLUMNS,
        TRACE_COLUMNS,
        Analysis,
        analyze_log,
        groups_from_protocol,
        read_sample_chunks,
    )
    from ._metabolism import (
        DailyMetabolism,
        areal_flux,
        classify_windows,
        daily_metabolism,
        daily_table,
        pair_windows,
        respiration_table,
    )
    from ._quality import QUALITY_INPUT_COLUMNS, QualityAccumulator, run_quality
    from ._regression import SlopeFit, SlopeSums, fit_o2_slope, fit_sums
    from ._report import analysis_figures, analysis_images, report_html, write_report
    from ._response import (
        CROSSING_COLUMNS,
        DIFFERENCE_COLUMNS,
        FIT_COLUMNS,
        LIGHT_COLUMNS,
        GroupSpec,
        group_differences,
        light_response,
        response_points,
        temperature_response,
        units,
    )
    from ._settings import EXCLUDING_FLAGS, AnalysisSettings, WindowFlag
    from ._windows import WINDOW_INPUT_COLUMNS, WindowAccumulator, group_rows, window_fits

_NAMES = {
    "CROSSING_COLUMNS": "_response",
    "CSV_TABLES": "_export",
    "DIFFERENCE_COLUMNS": "_response",
    "EXCLUDING_FLAGS": "_settings",
    "FIT_COLUMNS": "_response",
    "JSON_FORMAT": "_export",
    "LIGHT_COLUMNS": "_response",
    "QUALITY_INPUT_COLUMNS": "_quality",
    "READ_COLUMNS": "_log",
    "TRACE_COLUMNS": "_log",
    "WINDOW_INPUT_COLUMNS": "_windows",
    "Analysis": "_log",
    "AnalysisSettings": "_settings",
    "ArrheniusFit": "_fits",
    "Crossing": "_fits",
    "DailyMetabolism": "_metabolism",
    "GroupSpec": "_response",
    "LightFit": "_fits",
    "QualityAccumulator": "_quality",
    "SlopeFit": "_regression",
    "SlopeSums": "_regression",
    "WindowAccumulator": "_windows",
    "WindowFlag": "_settings",
    "analysis_figures": "_report",
    "analysis_images": "_report",
    "analysis_json": "_export",
    "analyze_log": "_log",
    "areal_flux": "_metabolism",
    "classify_windows": "_metabolism",
    "crossing_temperature": "_fits",
    "daily_metabolism": "_metabolism",
    "daily_table": "_metabolism",
    "distinct_temperatures": "_fits",
    "fit_arrhenius": "_fits",
    "fit_light_response": "_fits",
    "fit_o2_slope": "_regression",
    "fit_sums": "_regression",
    "group_differences": "_response",
    "group_rows": "_windows",
    "groups_from_protocol": "_log",
    "inverse_temperature_ev": "_fits",
    "light_levels": "_fits",
    "light_response": "_response",
    "pair_windows": "_metabolism",
    "read_sample_chunks": "_log",
    "records": "_export",
    "report_html": "_report",
    "respiration_table": "_metabolism",
    "response_points": "_response",
    "rig_name": "_export",
    "run_quality": "_quality",
    "temperature_response": "_response",
    "units": "_response",
    "window_fits": "_windows",
    "windows_with_rates": "_export",
    "write_csv_tables": "_export",
    "write_json": "_export",
    "write_report": "_report",
}

__getattr__, __dir__ = lazy_exports(__name__, _NAMES)

__all__ = [
    "CROSSING_COLUMNS",
    "CSV_TABLES",
    "DIFFERENCE_COLUMNS",
    "EXCLUDING_FLAGS",
    "FIT_COLUMNS",
    "JSON_FORMAT",
    "LIGHT_COLUMNS",
    "QUALITY_INPUT_COLUMNS",
    "READ_COLUMNS",
    "TRACE_COLUMNS",
    "WINDOW_INPUT_COLUMNS",
    "Analysis",
    "AnalysisSettings",
    "ArrheniusFit",
    "Crossing",
    "DailyMetabolism",
    "GroupSpec",
    "LightFit",
    "QualityAccumulator",
    "SlopeFit",
    "SlopeSums",
    "WindowAccumulator",
    "WindowFlag",
    "analysis_figures",
    "analysis_images",
    "analysis_json",
    "analyze_log",
    "areal_flux",
    "classify_windows",
    "crossing_temperature",
    "daily_metabolism",
    "daily_table",
    "distinct_temperatures",
    "fit_arrhenius",
    "fit_light_response",
    "fit_o2_slope",
    "fit_sums",
    "group_differences",
    "group_rows",
    "groups_from_protocol",
    "inverse_temperature_ev",
    "light_levels",
    "light_response",
    "pair_windows",
    "read_sample_chunks",
    "records",
    "report_html",
    "respiration_table",
    "response_points",
    "rig_name",
    "run_quality",
    "temperature_response",
    "units",
    "window_fits",
    "windows_with_rates",
    "write_csv_tables",
    "write_json",
    "write_report",
]
