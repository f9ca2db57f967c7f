"""``squall tune``: printed gains, the tuned rig file, refusals before any experiment."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

from controller.cli import main
from controller.errors import SquallError
from controller.files import load_model
from controller.rig import Rig
from controller.rig._control import node_control


@pytest.fixture
def rig_file(tmp_path: Path, repo_root: Path) -> Path:
    path = tmp_path / "rack8.toml"
    shutil.copy(repo_root / "rigs" / "saltmarrow-rack8.toml", path)
    return path


def test_tune_prints_gains_and_writes_them_to_a_new_rig_file(
    rig_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "tuned.toml"
    code = main(["tune", "C2", "--rig", str(rig_file), "--sim", "--seed", "4", "--write", str(out)])
    printed = capsys.readouterr().out
    assert code == 0
    assert "lagoon-bath (C1, C2, C3, C4)" in printed
    assert f"rig with tuned gains: {out}" in printed
    tuned = load_model(out, Rig)
    gains = node_control(tuned, ["C1", "C2", "C3", "C4"])
    assert gains is not None and gains.period_s == 10.0 and gains.td_s == 0.0
    assert all(tuned.chamber(c).control == gains for c in ("C1", "C2", "C3", "C4"))
    assert tuned.chamber("C5").control is None  # other nodes untouched
    kc_row = next(line for line in printed.splitlines() if "SIMC Kc" in line)
    assert f"{gains.kc:.4g}" in kc_row
    # comments and the rest of the file are kept
    text = out.read_text()
    assert text.startswith("# Saltmarrow Lagoon rack 8")
    assert text.replace(text[text.index("[chambers.control]") :], "") in rig_file.read_text()
    original = load_model(rig_file, Rig)
    assert tuned.model_dump(exclude={"chambers"}) == original.model_dump(exclude={"chambers"})


def test_an_existing_output_is_refused_before_the_experiment(
    rig_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "taken.toml"
    out.write_text("keep me")
    assert main(["tune", "C5", "--rig", str(rig_file), "--sim", "--write", str(out)]) == 2
    assert capsys.readouterr().err == (
        f"squall: error: {out}: already exists; refusing to overwrite it\n"
    )
    assert out.read_text() == "keep me"


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["C9"], "the rig has no chamber 'C9' (chambers: C1, C2, C3, C4, C5, C6, C7, C8)"),
        (["C5", "--amplitude-pct", "150"], "--amplitude-pct: must be at most 100 %"),
        (
            ["C5", "--hysteresis-c", "0.4"],
            "--hysteresis-c: must be 0 or more and below a quarter of the largest deviation",
        ),
        (["C5", "--sample-s", "0"], "--sample-s: must be a number above 0, got 0.0"),
    ],
)
def test_bad_arguments_are_one_line_and_exit_2(
    rig_file: Path, capsys: pytest.CaptureFixture[str], args: list[str], message: str
) -> None:
    assert main(["tune", *args, "--rig", str(rig_file), "--sim"]) == 2
    assert capsys.readouterr().err == f"squall: error: {message}\n"


def test_a_rig_in_use_by_a_controller_is_refused_before_any_device(
    rig_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from controller.runtime._launch import RigLock

    held = RigLock(rig_file)  # what 'squall run' holds on a rig's devices
    try:
        assert main(["tune", "C5", "--rig", str(rig_file)]) == 2
    finally:
        held.release()
    assert capsys.readouterr().err == (
        f"squall: error: {rig_file}: another controller (process {os.getpid()}) is running "
        "this rig; stop it first (one controller per rig)\n"
    )


def test_without_the_lock_held_the_device_path_is_tried(
    rig_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The example rig names no devices: past the lock, the [io] table is what is missing.
    assert main(["tune", "C5", "--rig", str(rig_file)]) == 2
    assert "the rig has no [io] table" in capsys.readouterr().err
    from controller.runtime._launch import RigLock

    RigLock(rig_file).release()  # the tune released the rig again when it gave up


def _rig_with_gains(tmp_path: Path, repo_root: Path, c1: str, c2: str) -> Path:
    text = (repo_root / "rigs" / "saltmarrow-rack8.toml").read_text()
    for chamber, gains in (("C1", c1), ("C2", c2)):
        anchor = f'id = "{chamber}"\n'
        block_end = text.index("[[chambers]]", text.index(anchor))
        text = text[:block_end] + f"[chambers.control]\n{gains}\n\n" + text[block_end:]
    path = tmp_path / "gains.toml"
    path.write_text(text)
    return path


def test_chambers_of_one_bath_must_give_the_same_gains(tmp_path: Path, repo_root: Path) -> None:
    same = _rig_with_gains(
        tmp_path, repo_root, "kc = 400.0\nti_s = 440.0", "kc = 400.0\nti_s = 440.0"
    )
    rig = load_model(same, Rig)
    gains = node_control(rig, ["C3", "C4"])  # any member of the bath finds the bath's gains
    assert gains is not None and (gains.kc, gains.ti_s, gains.td_s) == (400.0, 440.0, 0.0)
    assert node_control(rig, ["C5"]) is None
    (tmp_path / "gains.toml").unlink()
    other = _rig_with_gains(
        tmp_path, repo_root, "kc = 400.0\nti_s = 440.0", "kc = 300.0\nti_s = 440.0"
    )
    with pytest.raises(SquallError) as caught:
        load_model(other, Rig)
    line = caught.value.one_line()
    assert line.startswith(f"{other}:") and "chambers.1.control" in line
    assert "share one temperature loop" in line
