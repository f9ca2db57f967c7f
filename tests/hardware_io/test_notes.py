"""The wiring and calibration notes: their rig-file snippets are valid and their code runs."""

from __future__ import annotations

import contextlib
import io
import re
import tomllib
from pathlib import Path

import pytest

from controller.rig._io import InputCorrection, RigIo

pytestmark = pytest.mark.timeout(30)


def blocks(repo_root: Path, page: str, language: str) -> list[str]:
    text = (repo_root / "hardware-notes" / page).read_text(encoding="utf-8")
    return re.findall(rf"```{language}\n(.*?)```", text, flags=re.DOTALL)


def test_the_wiring_notes_io_tables_are_valid(repo_root: Path) -> None:
    found = blocks(repo_root, "wiring.md", "toml")
    assert len(found) == 4
    for block in found:
        table = tomllib.loads(block)["io"]
        if "from_announcement" not in table and "modbus" not in table:  # an optode snippet
            table["modbus"] = [
                {"name": "m", "chambers": list(table["optodes"]), "tcp": {"host": "h"}}
            ]
        rig_io = RigIo.model_validate(table)
        named = [c for ids in rig_io.link_chambers([]) for c in ids]
        rig_io.check_chambers(named)  # every chamber on one link, layouts that fit


def run(code: str) -> str:
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(code, "<calibration.md>", "exec"), {})
    return out.getvalue()


def test_the_calibration_notes_code_runs_and_gives_what_the_text_says(repo_root: Path) -> None:
    lamp, optode, probe = blocks(repo_root, "calibration.md", "python")
    p100, k = (float(x) for x in re.findall(r"= ([\d.]+)", run(lamp)))
    # the invented readings saturate: a curve with k > 0 and P100 near the 100 % reading
    assert 650 < p100 < 700 and 0.2 < k < 3.0
    lines = run(optode).splitlines()
    c100 = float(re.search(r"C100 = ([\d.]+)", lines[0]).group(1))
    # Garcia & Gordon (1992) at 18 °C, S = 30: about 240 µmol/L at 1 atm (REFERENCES table
    # brackets it between 231 (20 °C, S 35) and 284 (20 °C, S 0)); 1008 hPa lowers it ~0.5 %
    assert 230 < c100 < 250
    o2 = float(re.search(r"-> ([\d.]+)", lines[1]).group(1))
    assert 0 < o2 < c100  # a phase between the two calibration phases lies between 0 and C100
    gain, offset = (float(x) for x in re.findall(r"= (-?[\d.]+)", run(probe).splitlines()[0]))
    (correction,) = blocks(repo_root, "calibration.md", "toml")
    entry = InputCorrection.model_validate(tomllib.loads(correction)["io"]["corrections"]["A1"])
    assert entry.temperature_gain == pytest.approx(gain, abs=1e-4)
    assert entry.temperature_offset_c == pytest.approx(offset, abs=1e-3)
