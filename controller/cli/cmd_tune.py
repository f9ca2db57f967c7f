"""``squall tune CHAMBER --rig RIG [--sim] [--amplitude-pct D] [--hysteresis-c E]
[--max-deviation-c X] [--write RIG_OUT]``: relay autotuning of a chamber's temperature loop.

Rules
-----
- The chamber's whole thermal node is tuned (for a chamber in a shared bath: the bath). The
  experiment is :func:`controller.runtime._autotune.relay_tune`: outputs off while the node
  is watched, then a relay around the present temperature, within ±``--max-deviation-c`` and
  the chamber limits; anything beyond aborts and drives every output safe (exit 1).
- ``--sim`` runs on the rig's simulated chambers in this process on a virtual clock (an hour
  of experiment in about a second). Without it the rig's ``[io]`` devices are used in real
  time, and the rig must be free: the rig lock that ``squall run`` holds on
  ``<rig>.lock`` is taken for the whole experiment, and a rig in use is refused (one line,
  exit 2) before any device is touched. Simulated rigs live inside the process and share no
  devices, so ``--sim`` takes no lock (as ``squall run --sim``).
- The model, the SIMC gains and, for comparison, the gains the runtime derives from the rig's
  thermal description are printed. ``--write RIG_OUT`` writes a copy of the rig file with the
  gains as a ``[chambers.control]`` table on every chamber of the node (comments and layout
  kept); an existing file is never overwritten, and the copy is validated before it is
  written.
"""

from __future__ import annotations

import argparse
import math
import sys
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from controller.errors import SquallError

if TYPE_CHECKING:
    from controller.rig import Rig
    from controller.runtime._autotune import RelaySettings, TuneResult

__all__ = ["register", "tune_simulated", "tuned_rig_text"]

_OPTIONS = {
    "amplitude_pct": "--amplitude-pct",
    "hysteresis_c": "--hysteresis-c",
    "max_deviation_c": "--max-deviation-c",
    "sample_s": "--sample-s",
    "period_s": "--period",
    "pump_pct": "--pump-pct",
}


def register(sub: Any) -> None:
    """Add the ``tune`` subcommand to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser (no unit).
    """
    parser = sub.add_parser(
        "tune",
        help="autotune a chamber's temperature loop by a relay experiment",
        description=(
            "Find PID gains for a chamber's temperature loop: a relay experiment around the "
            "present temperature (Åström & Hägglund) gives the limit cycle, a first-order-"
            "plus-dead-time model follows, and the SIMC rules (Skogestad) give the gains. "
            "A chamber in a shared bath tunes the whole bath."
        ),
    )
    parser.add_argument("chamber", metavar="CHAMBER", help="chamber id in the rig")
    parser.add_argument("--rig", metavar="RIG", type=Path, required=True, help="rig file (TOML)")
    parser.add_argument(
        "--sim", action="store_true", help="tune the rig's simulated chamber in this process"
    )
    parser.add_argument(
        "--amplitude-pct",
        metavar="D",
        type=float,
        default=40.0,
        help="relay amplitude, %% of full heater power (default 40)",
    )
    parser.add_argument(
        "--hysteresis-c",
        metavar="E",
        type=float,
        default=None,
        help="relay hysteresis, °C (default three probe-noise SDs, at least 0.01)",
    )
    parser.add_argument(
        "--max-deviation-c",
        metavar="X",
        type=float,
        default=1.0,
        help="abort beyond this distance from the start temperature, °C (default 1)",
    )
    parser.add_argument(
        "--sample-s", metavar="S", type=float, default=2.0, help="relay sample period, s (2)"
    )
    parser.add_argument(
        "--period",
        metavar="S",
        type=float,
        default=10.0,
        help="control tick period the gains are for, s (default 10, as squall run)",
    )
    parser.add_argument(
        "--pump-pct",
        metavar="P",
        type=float,
        default=0.0,
        help="pump drive during the experiment, %% (default 0: no flushing)",
    )
    parser.add_argument(
        "--seed", metavar="N", type=int, default=None, help="with --sim: sensor-noise seed"
    )
    parser.add_argument(
        "--write",
        metavar="RIG_OUT",
        type=Path,
        default=None,
        help="write a copy of the rig with the gains as [chambers.control] (never overwrites)",
    )
    parser.set_defaults(handler=_handle)


def _settings(args: argparse.Namespace) -> RelaySettings:
    from controller.runtime._autotune import RelaySettings

    try:
        return RelaySettings(
            amplitude_pct=args.amplitude_pct,
            hysteresis_c=args.hysteresis_c,
            max_deviation_c=args.max_deviation_c,
            sample_s=args.sample_s,
            period_s=args.period,
            pump_pct=args.pump_pct,
        )
    except SquallError as exc:
        raise SquallError(exc.message, field=_OPTIONS.get(exc.field or "", exc.field)) from None


def tune_simulated(
    rig: Rig,
    chamber: str,
    settings: RelaySettings | None = None,
    *,
    seed: int | None = None,
    progress: Any = None,
) -> TuneResult:
    """Tune a chamber's node on the in-process simulator, on a virtual clock.

    Parameters
    ----------
    rig
        The rig with its simulator parameters (no unit).
    chamber
        Chamber to tune (no unit).
    settings
        Experiment choices (no unit).
    seed
        Sensor-noise seed, dimensionless; default the rig's.
    progress
        Called with a line of text as the experiment goes (no unit).

    Returns
    -------
    TuneResult
        Model, gains and record (°C, s, %); an hour of experiment takes about a second.
    """
    from controller.clock import VirtualClock, run_with_clock
    from controller.runtime._autotune import RelaySettings, relay_tune, tune_node
    from controller.runtime._sim_io import SimulatedIO
    from simulator import Rack

    s = settings or RelaySettings()
    tune_node(rig, chamber)  # an unknown chamber is refused before anything is built
    start = datetime.now(UTC).replace(microsecond=0)
    clock = VirtualClock(start)
    rack = Rack(rig, seed=seed, start_utc=start)
    io = SimulatedIO(rack, clock, step_s=s.sample_s, watchdog_s=max(3.0 * s.sample_s, 10.0))
    return run_with_clock(clock, lambda _c: relay_tune(io, clock, rig, chamber, s, progress))


def _tune_hardware(
    rig: Rig, rig_path: Path, chamber: str, settings: RelaySettings, progress: Any
) -> TuneResult:
    from controller.clock import RealClock, run_with_clock
    from controller.runtime import RunSettings
    from controller.runtime._autotune import relay_tune
    from controller.runtime._hardware_io import HardwareIO

    clock = RealClock()
    timeout_s = min(1.0, settings.sample_s / 4.0)
    run = RunSettings(
        period_s=settings.sample_s, read_timeout_s=timeout_s, write_timeout_s=timeout_s
    )
    io = HardwareIO.from_rig(rig, clock, base_dir=rig_path.parent, settings=run)
    return run_with_clock(clock, lambda _c: relay_tune(io, clock, rig, chamber, settings, progress))


def _number(value: float) -> float:
    """A gain rounded to five significant digits for the rig file."""
    return float(f"{value:.5g}") if math.isfinite(value) else value


def tuned_rig_text(rig_text: str, rig_path: Path, result: TuneResult) -> str:
    """The rig file's text with the tuned gains on every chamber of the node.

    Parameters
    ----------
    rig_text
        The rig file as it is (no unit).
    rig_path
        Its path, for messages (no unit).
    result
        The tuning result (gains in % per °C, s, s).

    Returns
    -------
    str
        The new text, comments and layout kept; validated as a rig (no unit).
    """
    import tomlkit

    from controller.files import parse_toml, validate_data
    from controller.rig import Rig

    doc = tomlkit.parse(rig_text)
    g, m, a = result.gains, result.model, result.analysis
    when = datetime.now(UTC).strftime("%Y-%m-%d")
    source = (
        f"squall tune {when}: relay {result.amplitude_pct:.3g} %, a {a.amplitude_c:.3g} °C, "
        f"P {a.period_s:.4g} s; k {m.gain:.4g} °C/%, tau {m.tau_s:.4g} s, theta {m.theta_s:.3g} s"
    )
    by_id = {str(c["id"]): c for c in doc["chambers"]}  # type: ignore[union-attr]
    for chamber in result.node.chambers:
        table = tomlkit.table()
        table.add("kc", _number(g.kc))
        table.add("ti_s", _number(g.ti_s))
        table.add("td_s", _number(g.td_s))
        table.add("period_s", _number(result.period_s))
        table.add("source", source)
        table.add(tomlkit.nl())
        by_id[chamber]["control"] = table
    text = tomlkit.dumps(doc)
    validate_data(parse_toml(text, file=rig_path), Rig, text=text, file=rig_path)
    return text


def _print(result: TuneResult, rig: Rig) -> None:
    from rich.console import Console
    from rich.table import Table

    from controller.control import simc
    from controller.runtime import node_model

    node, a, m, g = result.node, result.analysis, result.model, result.gains
    rig_model = node_model(rig, node.chambers, result.period_s)
    rig_gains = simc(rig_model)
    table = Table(title=f"{node.name} ({', '.join(node.chambers)})", title_justify="left")
    for column in ("", "value", "unit"):
        table.add_column(column)
    rows = [
        ("start temperature", f"{result.start_temperature_c:.3f}", "°C"),
        ("probe noise (SD)", f"{result.noise_c:.4f}", "°C"),
        ("relay bias / amplitude", f"{result.bias_pct:.1f} / {result.amplitude_pct:.1f}", "%"),
        ("hysteresis set / effective", f"{result.hysteresis_c:.3f} / {a.hysteresis_c:.3f}", "°C"),
        ("limit cycle amplitude", f"{a.amplitude_c:.4f}", "°C"),
        ("ultimate gain Ku", f"{result.ultimate_gain:.4g}", "% per °C"),
        ("ultimate period Pu", f"{result.ultimate_period_s:.1f}", "s"),
        ("model gain k", f"{m.gain:.4g}", "°C per %"),
        ("model time constant τ1", f"{m.tau_s:.0f}", "s"),
        ("model dead time θ", f"{m.theta_s:.1f}", "s"),
        (f"SIMC Kc (tick {result.period_s:g} s)", f"{g.kc:.4g}", "% per °C"),
        ("SIMC Ti", f"{g.ti_s:.4g}", "s"),
        ("SIMC Td", f"{g.td_s:.4g}", "s"),
        ("rig-model Kc / Ti", f"{rig_gains.kc:.4g} / {rig_gains.ti_s:.4g}", "% per °C / s"),
        ("experiment", f"{result.duration_s / 60:.1f} min, {result.cycles_run} cycles", ""),
    ]
    for row in rows:
        table.add_row(*row)
    Console(highlight=False).print(table)


def _handle(args: argparse.Namespace) -> int:
    """Tune; print the gains; write the tuned rig on request."""
    from controller.files import load_model, read_text
    from controller.rig import Rig
    from controller.runtime._autotune import tune_node

    settings = _settings(args)
    rig_path: Path = args.rig
    rig = load_model(rig_path, Rig)
    rig_text = read_text(rig_path)
    tune_node(rig, args.chamber)
    out: Path | None = args.write
    if out is not None:
        if out.exists():
            raise SquallError("already exists; refusing to overwrite it", file=out)
        if not out.parent.is_dir():
            raise SquallError("its folder does not exist", file=out)
    lock = None
    if not args.sim:
        from controller.runtime._launch import RigLock

        lock = RigLock(rig_path)  # refused while a controller runs this rig
    progress = _Progress() if sys.stderr.isatty() else None
    try:
        if args.sim:
            result = tune_simulated(rig, args.chamber, settings, seed=args.seed, progress=progress)
        else:
            result = _tune_hardware(rig, rig_path, args.chamber, settings, progress)
    finally:
        if progress is not None:
            progress.done()
        if lock is not None:
            lock.release()
    _print(result, rig)
    if out is not None:
        text = tuned_rig_text(rig_text, rig_path, result)
        try:
            with open(out, "x", encoding="utf-8") as handle:
                handle.write(text)
        except FileExistsError:
            raise SquallError("already exists; refusing to overwrite it", file=out) from None
        print(f"rig with tuned gains: {out}")
    return 0


class _Progress:
    """One updating status line on a terminal."""

    def __init__(self) -> None:
        from rich.console import Console

        self.status = Console(stderr=True).status("starting")
        self.status.start()

    def __call__(self, text: str) -> None:
        self.status.update(text)

    def done(self) -> None:
        self.status.stop()
