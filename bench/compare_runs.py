"""Compare two checkouts' simulated runs row for row: what a speed change must leave alone.

A change made for speed must not change what a run does. This runs the same seeded
simulation (the storm example cut to 6 h + 1 d + 6 h, the example rig, ``squall run --sim
--speed max`` at a 10 s tick, as ``bench_run.py --quick`` does) from each checkout, each in
a fresh process, and compares every table of the two run logs: row counts, every text and
enum value exactly, every number within ``--tol`` (default 1e-9; a reordered sum may move
the last bits). The audit table is skipped (it names the files' paths). Wall times are
printed side by side; with ``--repeat N`` the pair runs N times, alternating, best taken.

Run: ``python bench/compare_runs.py [--base TREE] [--tree TREE] [--tol X] [--repeat N]``
(default base: the ``main`` branch checked out by ``git worktree`` into a temporary folder;
default tree: this checkout). Exit 0 when the logs agree, 1 when they differ.
"""

from __future__ import annotations

import argparse
import math
import os
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
RUN = """
import sys
from pathlib import Path
sys.path[:0] = [{tree!r}, {bench!r}]
import bench_run
folder = Path({folder!r})
protocol = bench_run.seven_day_protocol(folder, quick=True)
bench_run.run_cli(protocol, Path({log!r}), 10.0)
"""


def run(tree: Path, log: Path, folder: Path) -> float:
    """One simulated run from ``tree`` in a fresh process; its wall time, s."""
    code = RUN.format(tree=str(tree), bench=str(tree / "bench"), folder=str(folder), log=str(log))
    env = dict(os.environ, PYTHONPATH=str(tree))
    start = time.perf_counter()
    subprocess.run([sys.executable, "-c", code], check=True, env=env, cwd=folder)
    return time.perf_counter() - start


def differences(base: Path, new: Path, tol: float) -> list[str]:
    """What differs between two run logs, one line per table that differs."""
    found: list[str] = []
    a, b = sqlite3.connect(base), sqlite3.connect(new)
    try:
        tables = [r[0] for r in a.execute("SELECT name FROM sqlite_master WHERE type='table'")]
        for table in tables:
            if table in ("run", "audit"):
                continue
            cols = [r[1] for r in a.execute(f"PRAGMA table_info({table})") if r[1] != "seq"]
            query = f"SELECT {', '.join(cols)} FROM {table} ORDER BY seq"
            rows_a, rows_b = a.execute(query).fetchall(), b.execute(query).fetchall()
            if len(rows_a) != len(rows_b):
                found.append(f"{table}: {len(rows_a)} rows in the base, {len(rows_b)} now")
                continue
            worst: dict[str, float] = {}
            for x, y in zip(rows_a, rows_b, strict=True):
                for name, u, v in zip(cols, x, y, strict=True):
                    if isinstance(u, float) and isinstance(v, float):
                        gap = abs(u - v) if not (math.isnan(u) and math.isnan(v)) else 0.0
                    else:
                        gap = 0.0 if u == v else math.inf
                    if gap > tol and gap > worst.get(name, 0.0):
                        worst[name] = gap
            if worst:
                found.append(f"{table}: " + ", ".join(f"{k} by {v:.3g}" for k, v in worst.items()))
    finally:
        a.close()
        b.close()
    return found


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--base", type=Path, help="checkout to compare with (default: main)")
    parser.add_argument("--tree", type=Path, default=ROOT, help="checkout under test")
    parser.add_argument("--tol", type=float, default=1e-9, help="largest number difference")
    parser.add_argument("--repeat", type=int, default=1, help="runs of each, alternating")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        base = args.base
        if base is None:
            base = folder / "base"
            subprocess.run(
                ["git", "-C", str(ROOT), "worktree", "add", "-q", "--detach", str(base), "main"],
                check=True,
            )
        try:
            walls: dict[str, list[float]] = {"base": [], "tree": []}
            for k in range(max(1, args.repeat)):
                for name, tree in (("base", base), ("tree", args.tree)):
                    log = folder / f"{name}-{k}.sqlite"
                    walls[name].append(run(Path(tree).resolve(), log, folder))
            print(f"base {base}: best {min(walls['base']):.2f} s of {len(walls['base'])}")
            print(f"tree {args.tree}: best {min(walls['tree']):.2f} s of {len(walls['tree'])}")
            print(f"ratio tree/base {min(walls['tree']) / min(walls['base']):.3f}")
            found = differences(folder / "base-0.sqlite", folder / "tree-0.sqlite", args.tol)
        finally:
            if args.base is None:
                subprocess.run(
                    ["git", "-C", str(ROOT), "worktree", "remove", "--force", str(base)],
                    check=False,
                )
    for line in found:
        print(f"DIFFERS {line}")
    if not found:
        print(f"same: every table agrees (numbers within {args.tol:g})")
    return 1 if found else 0


if __name__ == "__main__":
    raise SystemExit(main())
