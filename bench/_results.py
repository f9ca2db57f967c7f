"""Run every benchmark in ``bench/`` one after the other and write ``bench/RESULTS.md``.

Started by ``bench/run`` (which picks the Python); run ``bench/run --help`` for the options.

Rules
-----
- A benchmark is a file ``bench/bench_*.py``; they run in name order, each in its own process
  group with a timeout, from the checkout's root, with the checkout first on ``PYTHONPATH``.
  A benchmark whose source mentions the option ``--quick`` is given ``--quick`` when
  ``bench/run --quick`` is; the others run as they are.
- Everything a benchmark prints on standard output is copied into ``RESULTS.md`` verbatim, in
  a fenced block, with its exit code, wall time and peak resident memory. A failure or a
  timeout keeps the partial output and the end of standard error.
- Summary lines. A benchmark states a figure against its goal on a line of its own::

      RESULT: <figure> | <measured> | <goal>

  for example ``RESULT: sample / numpy.interp time | 1.42x | <= 3x`` or
  ``RESULT: ramp tracking RMS error | 0.031 °C | <= 0.05 °C``. ``<measured>`` starts with a
  number (a unit may follow); ``<goal>`` is a comparison (``<=``, ``>=``, ``<``, ``>``, ``≤``
  or ``≥``) and a number in the same unit. The runner reads both numbers and says whether the
  goal is met; a fourth field, if present, is a note. The summary table lists every RESULT
  line; for benchmarks that print none it quotes the lines that mention a goal.
- The machine description (CPU, cores, memory, OS, Python, library versions, load average,
  date, commit) and the command line head the file, so a table always says where it came from.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import re
import shlex
import signal
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path

__all__ = [
    "BenchOutcome",
    "Result",
    "discover",
    "machine_description",
    "main",
    "parse_result_line",
    "render",
    "run_bench",
]

BENCH_DIR = Path(__file__).resolve().parent
ROOT = BENCH_DIR.parent
LIBRARIES = (
    "numpy",
    "pandas",
    "scipy",
    "pydantic",
    "pyarrow",
    "gsw",
    "pvlib",
    "control",
    "pymodbus",
    "pyserial",
    "textual",
    "rich",
    "matplotlib",
    "aiomqtt",
)
"""Distributions whose versions the machine description lists (when installed)."""

RESULT_PREFIX = "RESULT:"
_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_GOAL = re.compile(rf"^\s*(<=|>=|≤|≥|<|>)\s*({_NUMBER})")
_MEASURED = re.compile(rf"^\s*({_NUMBER})")
_TAIL_LINES = 30


@dataclass(frozen=True)
class Result:
    """One ``RESULT:`` line, read.

    Attributes
    ----------
    figure
        What is measured, as the benchmark words it.
    measured
        The measured value as printed (number and unit).
    goal
        The goal as printed (comparison, number and unit), or ``""``.
    met
        Whether the measured number satisfies the goal; ``None`` when either is unreadable.
    note
        Anything after a fourth ``|``.
    """

    figure: str
    measured: str
    goal: str
    met: bool | None
    note: str = ""


@dataclass
class BenchOutcome:
    """What one benchmark run gave.

    Attributes
    ----------
    name
        File stem, e.g. ``bench_compile``.
    argv
        The command run (without the interpreter path).
    exit_code
        Process exit code (negative: killed by that signal); ``None`` when it timed out.
    wall_s
        Wall time, s.
    peak_rss_mib
        Peak resident memory of the benchmark process, MiB (``None`` if unknown).
    stdout
        Standard output, verbatim.
    stderr
        Standard error, verbatim.
    timeout_s
        The timeout it ran under, s.
    results
        Its ``RESULT:`` lines, read.
    """

    name: str
    argv: list[str]
    exit_code: int | None
    wall_s: float
    peak_rss_mib: float | None
    stdout: str
    stderr: str
    timeout_s: float
    results: list[Result] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """It finished in time with exit code 0."""
        return self.exit_code == 0


def parse_result_line(line: str) -> Result | None:
    """Read a ``RESULT: <figure> | <measured> | <goal> [| <note>]`` line.

    Parameters
    ----------
    line
        One line of a benchmark's output.

    Returns
    -------
    Result or None
        The parsed line, or ``None`` when the line is not a RESULT line.
    """
    text = line.strip()
    if not text.startswith(RESULT_PREFIX):
        return None
    parts = [part.strip() for part in text[len(RESULT_PREFIX) :].split("|")]
    figure = parts[0]
    measured = parts[1] if len(parts) > 1 else ""
    goal = parts[2] if len(parts) > 2 else ""
    note = " | ".join(parts[3:])
    met: bool | None = None
    value = _MEASURED.match(measured)
    target = _GOAL.match(goal)
    if value and target:
        x, limit, op = float(value.group(1)), float(target.group(2)), target.group(1)
        met = {
            "<=": x <= limit,
            "≤": x <= limit,
            ">=": x >= limit,
            "≥": x >= limit,
            "<": x < limit,
            ">": x > limit,
        }[op]
    return Result(figure, measured, goal, met, note)


def discover(folder: Path = BENCH_DIR) -> list[Path]:
    """Benchmark files ``bench_*.py`` in ``folder``, in name order.

    Parameters
    ----------
    folder
        Where to look.

    Returns
    -------
    list of Path
        The files.
    """
    return sorted(path for path in folder.glob("bench_*.py") if path.is_file())


def accepts_quick(path: Path) -> bool:
    """Whether a benchmark's source mentions the ``--quick`` option."""
    return "--quick" in path.read_text(encoding="utf-8", errors="replace")


def run_bench(path: Path, *, python: str, quick: bool, timeout_s: float) -> BenchOutcome:
    """Run one benchmark in its own process group; kill the group if it overruns.

    Parameters
    ----------
    path
        The benchmark file.
    python
        Interpreter to run it with.
    quick
        Pass ``--quick`` (only done when the benchmark accepts it).
    timeout_s
        Longest wall time allowed, s.

    Returns
    -------
    BenchOutcome
        Exit code, wall time, peak memory and output.
    """
    shown = path.relative_to(ROOT) if path.is_relative_to(ROOT) else path
    argv = [str(shown)] + (["--quick"] if quick and accepts_quick(path) else [])
    env = dict(os.environ)
    env["PYTHONUNBUFFERED"] = "1"
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(ROOT), env.get("PYTHONPATH")]))
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        started = time.perf_counter()
        proc = subprocess.Popen(
            [python, *argv],
            cwd=ROOT,
            env=env,
            stdin=subprocess.DEVNULL,
            stdout=out,
            stderr=err,
            start_new_session=True,
        )
        reaped: dict[str, object] = {}

        def reap() -> None:
            _, status, usage = os.wait4(proc.pid, 0)
            reaped["status"], reaped["usage"] = status, usage

        waiter = threading.Thread(target=reap, daemon=True)
        waiter.start()
        try:
            waiter.join(timeout_s)
        except KeyboardInterrupt:  # it runs in its own session: stop it too
            os.killpg(proc.pid, signal.SIGKILL)
            raise
        timed_out = waiter.is_alive()
        if timed_out:
            os.killpg(proc.pid, signal.SIGKILL)  # the benchmark's own process group only
            waiter.join()
        wall_s = time.perf_counter() - started
        proc.returncode = os.waitstatus_to_exitcode(int(reaped["status"]))  # type: ignore[call-overload]
        usage = reaped["usage"]
        rss = getattr(usage, "ru_maxrss", None)
        out.seek(0)
        err.seek(0)
        stdout, stderr = out.read(), err.read()
    outcome = BenchOutcome(
        name=path.stem,
        argv=argv,
        exit_code=None if timed_out else proc.returncode,
        wall_s=wall_s,
        peak_rss_mib=None if rss is None else rss / 1024.0,
        stdout=stdout,
        stderr=stderr,
        timeout_s=timeout_s,
    )
    outcome.results = [r for r in map(parse_result_line, stdout.splitlines()) if r is not None]
    return outcome


# -- machine ------------------------------------------------------------------------------------


def _cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.lower().startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def _memory_gib() -> str:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                return f"{int(line.split()[1]) / 1024**2:.1f} GiB"
    except OSError:
        pass
    return "unknown"


def _git(*args: str) -> str:
    try:
        done = subprocess.run(
            ["git", *args], cwd=ROOT, capture_output=True, text=True, timeout=30, check=True
        )
    except (OSError, subprocess.SubprocessError):
        return ""
    return done.stdout.strip()


def _version(name: str) -> str | None:
    try:
        return metadata.version(name)
    except metadata.PackageNotFoundError:
        return None


def machine_description() -> list[tuple[str, str]]:
    """Rows describing this machine and software, for the head of RESULTS.md.

    Returns
    -------
    list of (str, str)
        Label and value pairs.
    """
    import sqlite3

    cores = os.cpu_count() or 0
    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        usable = cores
    libraries = [(name, _version(name)) for name in LIBRARIES]
    listed = ", ".join(f"{name} {version}" for name, version in libraries if version)
    load = ", ".join(f"{x:.2f}" for x in os.getloadavg()) if hasattr(os, "getloadavg") else "?"
    commit = _git("rev-parse", "--short", "HEAD") or "unknown"
    if _git("status", "--porcelain", "--untracked-files=no"):
        commit += " (with uncommitted changes in the work tree)"
    return [
        ("CPU", f"{_cpu_model()}; {cores} logical cores, {usable} usable by this process"),
        ("Memory", _memory_gib()),
        ("OS", platform.platform()),
        ("Python", f"{platform.python_version()} ({platform.python_implementation()})"),
        ("squall", f"{_version('squall') or 'not installed'}, commit {commit}"),
        ("Libraries", f"{listed}; SQLite {sqlite3.sqlite_version}"),
        ("Load average at start (1, 5, 15 min)", load),
    ]


# -- report -------------------------------------------------------------------------------------


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ").strip() or "–"


def _status(outcome: BenchOutcome) -> str:
    if outcome.exit_code is None:
        return f"timed out after {outcome.timeout_s:g} s"
    if outcome.exit_code < 0:
        return f"killed by signal {-outcome.exit_code}"
    return f"exit {outcome.exit_code}"


def _verdict(met: bool | None) -> str:
    return {True: "met", False: "**missed**", None: "?"}[met]


def _goal_lines(outcome: BenchOutcome) -> list[str]:
    return [line.strip() for line in outcome.stdout.splitlines() if "goal" in line.lower()]


def render(
    outcomes: list[BenchOutcome],
    *,
    machine: list[tuple[str, str]],
    command: str,
    started_utc: dt.datetime,
    total_s: float,
) -> str:
    """The Markdown text of RESULTS.md.

    Parameters
    ----------
    outcomes
        One per benchmark, in run order.
    machine
        Rows from :func:`machine_description`.
    command
        The command line that produced the file.
    started_utc
        When the run started (UTC).
    total_s
        Wall time of the whole run, s.

    Returns
    -------
    str
        Markdown.
    """
    minutes, seconds = divmod(round(total_s), 60)
    lines = [
        "# Benchmark results",
        "",
        f"Produced by `{command}` on {started_utc:%Y-%m-%d %H:%M} UTC in {minutes} min "
        f"{seconds} s; {len(outcomes)} benchmark{'' if len(outcomes) == 1 else 's'}, run one "
        "after the other. Each benchmark "
        "measures its figures side by side with its reference in the same process and run; "
        "what it printed is copied below verbatim. Regenerate with `bench/run` (or "
        "`bench/run --quick` for the short forms).",
        "",
        "## Machine",
        "",
        "| | |",
        "|---|---|",
        *(f"| {label} | {_cell(value)} |" for label, value in machine),
        "",
        "## Summary",
        "",
    ]
    rows: list[str] = []
    unformatted: list[BenchOutcome] = []
    for outcome in outcomes:
        for result in outcome.results:
            figure = result.figure + (f" ({result.note})" if result.note else "")
            rows.append(
                f"| {outcome.name} | {_cell(figure)} | {_cell(result.measured)} | "
                f"{_cell(result.goal)} | {_verdict(result.met)} |"
            )
        if not outcome.results:
            unformatted.append(outcome)
        if not outcome.ok:
            rows.append(f"| {outcome.name} | run | {_status(outcome)} | exit 0 | **failed** |")
    if rows:
        lines += ["| benchmark | figure | measured | goal | verdict |", "|---|---|---|---|---|"]
        lines += rows
    else:
        lines.append(f"No benchmark printed a `{RESULT_PREFIX}` line and every one ran.")
    if unformatted:
        lines += [
            "",
            f"Benchmarks that print no `{RESULT_PREFIX}` line; their lines that mention a goal:",
            "",
        ]
        for outcome in unformatted:
            quoted = _goal_lines(outcome)
            lines.append(f"- **{outcome.name}**" + ("" if quoted else ": none"))
            lines.extend(f"  - `{line}`" for line in quoted)
    lines += [
        "",
        f"Summary lines are those a benchmark prints as `{RESULT_PREFIX} <figure> | <measured> "
        "| <goal>` (for example `RESULT: sample / numpy.interp time | 1.42x | <= 3x`); "
        "`bench/run` compares the two numbers to give the verdict.",
    ]
    for outcome in outcomes:
        rss = "?" if outcome.peak_rss_mib is None else f"{outcome.peak_rss_mib:.0f} MiB"
        lines += [
            "",
            f"## {outcome.name}",
            "",
            f"`python {shlex.join(outcome.argv)}` · {_status(outcome)} · "
            f"{outcome.wall_s:.1f} s wall · peak RSS {rss}",
            "",
            "```text",
            outcome.stdout.rstrip("\n") or "(no output)",
            "```",
        ]
        if not outcome.ok and outcome.stderr.strip():
            tail = outcome.stderr.rstrip("\n").splitlines()[-_TAIL_LINES:]
            lines += ["", "Standard error (end):", "", "```text", *tail, "```"]
    return "\n".join(lines) + "\n"


# -- command line ---------------------------------------------------------------------------------


def _command_line(argv: list[str]) -> str:
    prefix = f"PYTHON={shlex.quote(os.environ['PYTHON'])} " if os.environ.get("PYTHON") else ""
    return prefix + shlex.join(["bench/run", *argv])


def main(argv: list[str] | None = None) -> int:
    """Run the benchmarks and write the results file; return the exit code.

    Parameters
    ----------
    argv
        Options (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        0 when every benchmark exited 0 in time, 1 otherwise, 2 for bad options.
    """
    args_list = list(sys.argv[1:] if argv is None else argv)
    parser = argparse.ArgumentParser(
        prog="bench/run",
        description="Run every bench/bench_*.py one after the other and write bench/RESULTS.md "
        "(machine, command, each benchmark's printed figures, and a summary of its RESULT lines).",
    )
    parser.add_argument(
        "--quick", action="store_true", help="pass --quick to benchmarks that accept it"
    )
    parser.add_argument(
        "--timeout",
        type=float,
        metavar="S",
        help="longest wall time per benchmark, s (default 900, or 300 with --quick)",
    )
    parser.add_argument(
        "--only", nargs="+", metavar="NAME", help="run only these (e.g. bench_log or log)"
    )
    parser.add_argument(
        "--output",
        type=Path,
        default=BENCH_DIR / "RESULTS.md",
        metavar="FILE",
        help="where to write (default bench/RESULTS.md)",
    )
    parser.add_argument("--list", action="store_true", help="list the benchmarks and stop")
    args = parser.parse_args(args_list)
    benches = discover()
    if args.only:
        wanted = {name if name.startswith("bench_") else f"bench_{name}" for name in args.only}
        wanted = {name.removesuffix(".py") for name in wanted}
        unknown = wanted - {path.stem for path in benches}
        if unknown:
            parser.error(f"no such benchmark: {', '.join(sorted(unknown))}")
        benches = [path for path in benches if path.stem in wanted]
    if args.list:
        for path in benches:
            print(f"{path.stem}{'  (accepts --quick)' if accepts_quick(path) else ''}")
        return 0
    if not benches:
        parser.error(f"no bench_*.py files in {BENCH_DIR}")
    timeout_s = args.timeout if args.timeout is not None else (300.0 if args.quick else 900.0)
    machine = machine_description()
    started_utc = dt.datetime.now(dt.UTC)
    started = time.perf_counter()
    outcomes: list[BenchOutcome] = []
    for number, path in enumerate(benches, start=1):
        print(f"[{number}/{len(benches)}] {path.stem} ...", end=" ", flush=True)
        outcome = run_bench(path, python=sys.executable, quick=args.quick, timeout_s=timeout_s)
        outcomes.append(outcome)
        print(f"{_status(outcome)}, {outcome.wall_s:.1f} s", flush=True)
    text = render(
        outcomes,
        machine=machine,
        command=_command_line(args_list),
        started_utc=started_utc,
        total_s=time.perf_counter() - started,
    )
    args.output.write_text(text, encoding="utf-8")
    print(f"wrote {args.output}")
    return 0 if all(outcome.ok for outcome in outcomes) else 1


if __name__ == "__main__":
    sys.exit(main())
