"""What every fuzz test here shares: the example budget, running the CLI, judging its error.

Budget rule: each ``@given`` test runs its own default number of cases, sized so the whole
folder stays well under 90 s on the CI machine; ``FUZZ_EXAMPLES=N`` in the environment runs
N cases per test instead (e.g. ``FUZZ_EXAMPLES=5000`` for a thorough run by hand or from a
benchmark), with fresh random data each time instead of the fixed, derandomised CI draw.
"""

from __future__ import annotations

import contextlib
import io
import os
import re
from pathlib import Path

from hypothesis import HealthCheck, settings

from controller.cli import main

__all__ = ["ERROR_LINE", "budget", "examples", "judge_error", "run_cli"]

_OVERRIDE = os.environ.get("FUZZ_EXAMPLES", "").strip()

ERROR_LINE = re.compile(r"^squall: error: (?P<file>.+?):(?P<line>\d+): (?P<rest>\S.*)$")
"""A located user error: ``squall: error: FILE:LINE: [field.path: ]message``."""


def examples(default: int) -> int:
    """Cases per test: ``default`` in CI, or ``FUZZ_EXAMPLES`` when set (a count, at least 1)."""
    return max(1, int(_OVERRIDE)) if _OVERRIDE else default


def budget(default: int, *, deadline_ms: float | None = 2000.0) -> settings:
    """Hypothesis settings for one fuzz test running :func:`examples` (``default``) cases.

    Parameters
    ----------
    default
        Cases in CI, count.
    deadline_ms
        Longest time one case may take, ms: a pure decoder that crawls on some input fails.
        ``None`` for tests that run whole commands, whose first case imports pandas or
        matplotlib and takes seconds on a busy machine (pytest-timeout still ends a hang).

    Returns
    -------
    hypothesis.settings
        CI draws are derandomised so a failure reproduces; hand runs (``FUZZ_EXAMPLES``)
        explore afresh.
    """
    return settings(
        max_examples=examples(default),
        deadline=deadline_ms,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
        derandomize=not _OVERRIDE,
        database=None,
    )


def run_cli(argv: list[str]) -> tuple[int, str, str]:
    """Run ``squall`` in-process with ``argv``; return (exit code, stdout, stderr).

    argparse's own exits (``SystemExit``) are turned into their code, so the caller judges
    them like any other; every other exception propagates and fails the test.
    """
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = main(argv)
        except SystemExit as exc:
            code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 2)
    return code, out.getvalue(), err.getvalue()


def judge_error(err: str, files: dict[Path, bytes]) -> re.Match[str]:
    """Check ``err`` is one located error line naming one of ``files`` at a line it has.

    Parameters
    ----------
    err
        Everything the command wrote to standard error.
    files
        The input files the error may name, with their content (bytes, for the line count).

    Returns
    -------
    re.Match
        The parsed line (groups ``file``, ``line``, ``rest``).
    """
    assert "Traceback" not in err, err
    assert err.endswith("\n") and err.count("\n") == 1, f"not one line: {err!r}"
    match = ERROR_LINE.match(err.rstrip("\n"))
    assert match is not None, f"not 'squall: error: FILE:LINE: ...': {err!r}"
    named = Path(match["file"])
    if named in files:
        n_lines = files[named].count(b"\n") + 1
        assert 1 <= int(match["line"]) <= n_lines, (err, n_lines)
    else:  # a file one of them names (a CSV series), which must exist to have a line
        assert named.is_file(), err
    assert len(match["rest"].strip()) >= 8, f"message too terse to act on: {err!r}"
    return match
