"""``squall o2 solubility`` and ``squall o2 convert``: dissolved-oxygen arithmetic at the prompt.

Both print one number followed by its unit, for example ``274.610 umol/kg``. The science lives
in :mod:`controller.science.oxygen` (Garcia & Gordon 1992 solubility, SCOR WG 142 conversions).
"""

from __future__ import annotations

import argparse
from typing import Any

from controller.errors import SquallError
from controller.science import oxygen

__all__ = ["DECIMALS", "format_amount", "register"]

DECIMALS: dict[str, int] = {
    "umol/L": 3,
    "umol/kg": 3,
    "mg/L": 4,
    "mL/L": 4,
    "%sat": 2,
    "hPa": 3,
}
"""Decimals printed for each unit (about 1e-5 relative at typical values)."""

_UNIT_HELP = ", ".join(oxygen.UNITS)

_OPTION_OF = {"temp_c": "--temp-c", "salinity": "--salinity", "pressure_kpa": "--pressure-kpa"}


def _as_option(exc: SquallError) -> SquallError:
    """The same error with the function's argument name replaced by the CLI option."""
    return SquallError(exc.message, field=_OPTION_OF.get(exc.field or "", exc.field))


def format_amount(value: float, unit: str) -> str:
    """Render an oxygen amount as ``"<number> <unit>"``.

    Parameters
    ----------
    value
        The amount, in ``unit``.
    unit
        One of :data:`controller.science.oxygen.UNITS`.

    Returns
    -------
    str
        The number with the unit's usual decimals, a space and the unit.
    """
    return f"{value:.{DECIMALS[unit]}f} {unit}"


def _add_conditions(parser: argparse.ArgumentParser) -> None:
    """The water's temperature, salinity and barometric pressure options."""
    parser.add_argument(
        "--temp-c", type=float, required=True, metavar="T", help="water temperature, °C"
    )
    parser.add_argument(
        "--salinity", type=float, required=True, metavar="S", help="practical salinity (PSS-78)"
    )
    parser.add_argument(
        "--pressure-kpa",
        type=float,
        default=101.325,
        metavar="P",
        help="barometric pressure, kPa (default 101.325)",
    )


def register(sub: Any) -> None:
    """Add the ``o2`` subcommand and its two actions to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser.
    """
    parser = sub.add_parser(
        "o2",
        help="oxygen solubility and unit conversion",
        description=(
            "Dissolved-oxygen arithmetic: air-saturation solubility (Garcia & Gordon 1992, "
            "Benson & Krause coefficients) and conversions between units (SCOR WG 142). "
            f"Units: {_UNIT_HELP}."
        ),
    )
    actions = parser.add_subparsers(dest="o2_action", metavar="ACTION", parser_class=type(parser))
    actions.required = True

    solubility = actions.add_parser(
        "solubility",
        help="oxygen of air-saturated water",
        description=(
            "Print the oxygen of water in equilibrium with moist air at the given temperature, "
            "salinity and barometric pressure."
        ),
    )
    _add_conditions(solubility)
    solubility.add_argument(
        "--unit", default="umol/kg", metavar="U", help=f"unit of the result: {_UNIT_HELP}"
    )
    solubility.set_defaults(handler=_solubility)

    convert = actions.add_parser(
        "convert",
        help="convert an oxygen amount between units",
        description="Print VALUE (in UNIT) converted to the unit given with --to.",
    )
    convert.add_argument("value", type=float, metavar="VALUE", help="the amount to convert")
    convert.add_argument("unit", metavar="UNIT", help=f"unit of VALUE: {_UNIT_HELP}")
    convert.add_argument("--to", required=True, metavar="U", help=f"wanted unit: {_UNIT_HELP}")
    _add_conditions(convert)
    convert.set_defaults(handler=_convert)


def _solubility(args: argparse.Namespace) -> int:
    """Print the solubility; return the exit code."""
    unit = oxygen.normalise_unit(args.unit, field="--unit")
    try:
        value = oxygen.solubility(args.temp_c, args.salinity, args.pressure_kpa, unit=unit)
    except SquallError as exc:
        raise _as_option(exc) from None
    print(format_amount(float(value), unit))
    return 0


def _convert(args: argparse.Namespace) -> int:
    """Print the converted amount; return the exit code."""
    source = oxygen.normalise_unit(args.unit, field="UNIT")
    target = oxygen.normalise_unit(args.to, field="--to")
    try:
        value = oxygen.convert(
            args.value,
            source,
            target,
            temp_c=args.temp_c,
            salinity=args.salinity,
            pressure_kpa=args.pressure_kpa,
        )
    except SquallError as exc:
        raise _as_option(exc) from None
    print(format_amount(float(value), target))
    return 0
