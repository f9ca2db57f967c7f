"""Files of ``bench_realtime.py``: the 64-chamber rig derived from the example rig, its
``[io]`` tables (the simulator's announcement, or the announced blocks spread over K TCP
links) and the benchmark's protocol."""

from __future__ import annotations

import json
import math
import tomllib
from datetime import date
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
RIG = ROOT / "rigs" / "saltmarrow-rack8.toml"
TEMPLATES = ("C5", "C6", "C7", "C8")  # the example rig's chambers with their own water

__all__ = ["RIG", "announced_io", "linked_io", "write_protocol", "write_rig"]


def _toml(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)  # a valid TOML basic string
    if isinstance(value, date):  # a date or datetime read from the rig (TOML 1.0 literals)
        return value.isoformat()
    if isinstance(value, list) and not any(isinstance(v, dict) for v in value):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    raise TypeError(f"no TOML form for {value!r} in this bench")


def _table(lines: list[str], path: str, table: dict[str, Any]) -> None:
    """Append the scalars of ``table``, then its sub-tables as ``[path.key]``."""
    lines.extend(f"{k} = {_toml(v)}" for k, v in table.items() if not isinstance(v, dict))
    for key, value in table.items():
        if isinstance(value, dict):
            lines += ["", f"[{path}.{key}]"]
            _table(lines, f"{path}.{key}", value)


def write_rig(folder: Path, n: int, io_lines: list[str], name: str) -> tuple[Path, list[str]]:
    """Write the n-chamber rig with the given ``[io]`` lines; return its path and ids."""
    source = tomllib.loads(RIG.read_text(encoding="utf-8"))
    templates = [c for c in source["chambers"] if c["id"] in TEMPLATES]
    if len(templates) != len(TEMPLATES) or any("bath" in c for c in templates):
        raise SystemExit(f"{RIG.name} no longer has independent chambers {TEMPLATES}")
    lines = [f"# derived from {RIG.name} by bench/bench_realtime.py"]
    lines += [f"name = {_toml(source['name'] + f' x{n} (bench)')}", "", "[sim]"]
    _table(lines, "sim", {k: v for k, v in source.get("sim", {}).items() if k != "faults"})
    lines += ["", *io_lines]
    ids = [f"C{i + 1}" for i in range(n)]
    for i, cid in enumerate(ids):
        lines += ["", "[[chambers]]"]
        _table(lines, "chambers", dict(templates[i % len(templates)], id=cid))
    path = folder / f"{name}.toml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path, ids


def announced_io(ports_file: str) -> list[str]:
    """``[io]`` naming the simulator's ports file (what the issue asks to measure)."""
    return ["[io]", f"from_announcement = {_toml(ports_file)}"]


def linked_io(announcement: dict[str, Any], ids: list[str], links: int) -> list[str]:
    """``[io]`` with the announced blocks and optode ports spread over ``links`` TCP
    connections to the same simulator (chambers dealt out in rig order)."""
    modbus = announcement["modbus"]
    lines, size = ["[io]"], math.ceil(len(ids) / links)
    for k in range(0, len(ids), size):
        part = ids[k : k + size]
        lines += ["", "[[io.modbus]]", f'name = "simulator-{k // size + 1}"']
        lines += [f"tcp = {{ host = {_toml(modbus['host'])}, port = {modbus['port']} }}"]
        # one attempt of the 0.2 s budget: on a shared machine a late reply is likelier than
        lines += [f"chambers = {_toml(part)}", "timeout_s = 0.2", "attempts = 1"]  # a lost one
        lines += ["", "[io.modbus.register_map]", f"word_order = {_toml(modbus['word_order'])}"]
        for cid in part:
            block = modbus["blocks"][cid]
            lines += ["", f"[io.modbus.register_map.chambers.{cid}]"]
            lines += [f"unit_id = {block['unit_id']}", f"block_address = {block['base']}"]
    for cid, port in announcement.get("optodes", {}).items():
        lines += ["", f"[io.optodes.{cid}]", f"port = {_toml(port)}"]
    return lines


def write_protocol(folder: Path, ids: list[str], seconds: int, name: str) -> Path:
    """A protocol for every chamber: hold 20 °C, a 1 °C/h ramp, hold; light and flow held."""
    hold_s = max(1, seconds // 2)
    ramp_to_c = 20.0 + (seconds - hold_s) / 2 / 3600.0  # 1 °C/h for a quarter of the run
    text = f"""format = "squall-protocol/1"
title = "Real-time benchmark ({len(ids)} chambers, {seconds} s)"
begins = "on-launch"
utc_offset = "+00:00"

[groups.all]
role = "treatment"
chambers = {_toml(ids)}

[[phases]]
name = "realtime"
duration = "PT{seconds}S"
  [phases.programs]
  temperature = [
    {{ kind = "hold", value = 20.0, duration = "PT{hold_s}S" }},
    {{ kind = "ramp", to = {ramp_to_c:.6f}, rate_per_h = 1.0 }},
    {{ kind = "hold", value = {ramp_to_c:.6f} }},
  ]
  light = [ {{ kind = "hold", value = 300.0 }} ]
  flow = [ {{ kind = "hold", value = 4.0 }} ]
"""
    (path := folder / f"{name}.toml").write_text(text, encoding="utf-8")
    return path
