"""``squall demo``: writes the example, checks it, renders its preview."""

from __future__ import annotations

from importlib import resources
from pathlib import Path

import pytest

from controller.cli import main
from controller.demo import DEMO_FILES, DEMO_RIG

from ._png import png_size

REPO = Path(__file__).resolve().parents[2]


def test_demo_files_are_copies_of_the_examples() -> None:
    package = resources.files("controller.demo")
    for name, relative in DEMO_FILES.items():
        source = REPO / ("rigs" if name == DEMO_RIG else "protocols") / relative
        assert package.joinpath(name).read_bytes() == source.read_bytes()


def test_demo_writes_checks_and_previews(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--no-run"]) == 0
    protocol = out / "compound-heatwave-storm.toml"
    assert protocol.is_file()
    assert (out / "data" / "saltmarrow-sst.csv").is_file()
    assert png_size(out / "compound-heatwave-storm.png")[0] > 500
    rows = (out / "compound-heatwave-storm-setpoints.csv").read_text("utf-8").count("\n") - 1
    assert rows == (28 * 24 * 6 + 1) * 8  # 28 d every 10 min, both ends, 8 chambers
    printed = capsys.readouterr().out
    assert "Heatwave with a storm on its fifth day" in printed
    assert f"Demo files written to {out}/:" in printed
    assert f"{rows} rows" in printed
    # what was written is itself a valid protocol
    assert main(["check", str(protocol)]) == 0


def test_demo_default_folder(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.chdir(tmp_path)
    assert main(["demo", "--no-run"]) == 0
    assert (tmp_path / "squall-demo" / "compound-heatwave-storm.png").is_file()
    capsys.readouterr()


def test_demo_into_a_file_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    blocker = tmp_path / "taken"
    blocker.write_text("not a folder", encoding="utf-8")
    assert main(["demo", "--out", str(blocker), "--no-run"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("squall: error: ") and "cannot write the demo files" in err
    assert err.count("\n") == 1


def test_demo_runs_the_protocol_on_the_simulated_rig(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The README's first command: the whole 28-day compound run lands in a complete log."""
    from controller.storage import RunLogReader

    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out)]) == 0
    logs = sorted((out / "runs").glob("compound-heatwave-storm-*.sqlite"))
    assert len(logs) == 1
    printed = capsys.readouterr().out
    assert str(logs[0]) in printed and "squall analyze" in printed
    reader = RunLogReader(logs[0])
    assert reader.info().finished
    samples = reader.samples(columns=["chamber", "elapsed_s", "incubation"])
    assert set(samples["chamber"]) == {f"C{i}" for i in range(1, 9)}
    # 28 days at the demo's 5-minute tick, every chamber
    assert samples["elapsed_s"].max() >= 28 * 86400 - 300
    assert len(samples) >= 8 * (28 * 86400 // 300)
    # the protocol's [incubation] table makes closed windows for the O2 fluxes
    assert (samples["incubation"] == "closed").any()
    assert len(reader.windows()) > 8 * 28
