"""Pure science functions: light, marine heatwaves and cold spells, metabolic rates.

Rule: nothing in this package reads a clock, keeps global state or does I/O, except the CSV
loaders of :mod:`controller.science.heatwave`, which read only the file they are given. The
modules are public (``controller.science.light``, ``.heatwave``, ``.rates``); their names
are also re-exported here.
"""

from controller.science.heatwave import (
    CATEGORY_MULTIPLES,
    DAYS_IN_CLIMATOLOGY_YEAR,
    FEB29_DOY,
    Category,
    Climatology,
    ExtremeEvent,
    category_multiple,
    category_name,
    climatology,
    daily_series,
    detect,
    leap_day_of_year,
    load_climatology_csv,
    load_series_csv,
)
from controller.science.light import (
    SECONDS_PER_DAY,
    attenuation_factor,
    beer_lambert,
    daily_light_integral,
    dli_from_constant,
    dli_of_half_sine,
    half_sine_daylight,
    half_sine_peak_for_dli,
    sun_elevation_deg,
)
from controller.science.rates import (
    BOLTZMANN_EV_PER_K,
    ZERO_CELSIUS_K,
    arrhenius_factor,
    jassby_platt,
    platt,
    platt_optimum,
    q10_equivalent,
    q10_factor,
    q10_from_rates,
    webb,
)

__all__ = [
    "BOLTZMANN_EV_PER_K",
    "CATEGORY_MULTIPLES",
    "DAYS_IN_CLIMATOLOGY_YEAR",
    "FEB29_DOY",
    "SECONDS_PER_DAY",
    "ZERO_CELSIUS_K",
    "Category",
    "Climatology",
    "ExtremeEvent",
    "arrhenius_factor",
    "attenuation_factor",
    "beer_lambert",
    "category_multiple",
    "category_name",
    "climatology",
    "daily_light_integral",
    "daily_series",
    "detect",
    "dli_from_constant",
    "dli_of_half_sine",
    "half_sine_daylight",
    "half_sine_peak_for_dli",
    "jassby_platt",
    "leap_day_of_year",
    "load_climatology_csv",
    "load_series_csv",
    "platt",
    "platt_optimum",
    "q10_equivalent",
    "q10_factor",
    "q10_from_rates",
    "sun_elevation_deg",
    "webb",
]
