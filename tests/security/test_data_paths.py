"""Which files a protocol may make squall read (the rule in ``hardware-notes/security.md``).

The rule: CSV paths in a protocol (``series``, ``climatology``) are relative to the protocol
file's own folder, never to the folder squall is started in, so the same protocol reads the
same data whoever runs it from wherever; and since the run log keeps the protocol's text and
folder, a resumed run reads the same files. Paths that leave that folder (``../data/x.csv``,
absolute paths) are allowed on purpose: ``squall heatwave design`` writes them when a site
series lives beside the protocols folder, and an operator runs their own protocols with their
own rights. The data must be a regular file: a folder is refused clearly, and devices and
pipes are refused by their type before they are opened (a protocol naming ``/dev/zero``
would otherwise make ``squall check`` read forever).
"""

from __future__ import annotations

import contextlib
import io
import os
import shutil
from pathlib import Path

import pytest

from controller.cli import main

REPO = Path(__file__).resolve().parents[2]
EXAMPLE = REPO / "protocols" / "strong-heatwave.toml"
SERIES = REPO / "protocols" / "data" / "saltmarrow-sst.csv"
NAMED = "data/saltmarrow-sst.csv"


def _check(protocol: Path) -> tuple[int, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(["check", str(protocol)])
    return code, err.getvalue()


def _protocol_naming(folder: Path, series: str) -> Path:
    text = EXAMPLE.read_text(encoding="utf-8")
    assert text.count(NAMED) == 2  # the climatology program and the heatwave event
    path = folder / "heatwave.toml"
    path.write_text(text.replace(NAMED, series), encoding="utf-8")
    return path


def test_relative_paths_are_relative_to_the_protocol_not_the_working_folder(
    tmp_path: Path,
) -> None:
    project = tmp_path / "project"
    (project / "data").mkdir(parents=True)
    shutil.copy(SERIES, project / "data" / SERIES.name)
    protocol = _protocol_naming(project, NAMED)
    decoy = tmp_path / "elsewhere"
    (decoy / "data").mkdir(parents=True)
    (decoy / "data" / SERIES.name).write_text("date,temperature_c\nnot a date,1\n")
    with contextlib.chdir(decoy):  # a same-named file here must not be the one read
        assert _check(protocol) == (0, "")
        (project / "data" / SERIES.name).unlink()
        code, err = _check(protocol)
    assert code == 2 and "cannot read the file" in err  # the decoy would have parsed, badly


def test_paths_leaving_the_protocol_folder_are_allowed(tmp_path: Path) -> None:
    (tmp_path / "protocols").mkdir()
    (tmp_path / "site-data").mkdir()
    shutil.copy(SERIES, tmp_path / "site-data" / SERIES.name)
    sibling = _protocol_naming(tmp_path / "protocols", f"../site-data/{SERIES.name}")
    assert _check(sibling) == (0, "")
    absolute = _protocol_naming(tmp_path / "protocols", str(tmp_path / "site-data" / SERIES.name))
    assert _check(absolute) == (0, "")


def test_a_folder_named_as_data_is_refused_clearly(tmp_path: Path) -> None:
    (tmp_path / "data" / SERIES.name).mkdir(parents=True)
    code, err = _check(_protocol_naming(tmp_path, NAMED))
    assert code == 2
    assert "heatwave.toml:" in err and "cannot read the file" in err
    assert err.count("\n") == 1


def test_a_device_named_as_data_is_refused_by_its_type(tmp_path: Path) -> None:
    if not os.path.exists(os.devnull):
        pytest.skip("no null device")
    code, err = _check(_protocol_naming(tmp_path, os.devnull))
    assert code == 2 and "not a regular file" in err
