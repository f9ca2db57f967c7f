"""ChamberReadings, built for every chamber at every tick with its own __init__: the same
keywords, defaults, equality and immutability as the frozen dataclass it declares."""

from __future__ import annotations

import dataclasses
import inspect

import pytest

from controller.runtime import ChamberReadings
from controller.runtime._io import Quantity, stale_readings


def test_the_constructor_takes_every_field_by_keyword_with_the_declared_default() -> None:
    params = inspect.signature(ChamberReadings).parameters
    fields = dataclasses.fields(ChamberReadings)
    assert list(params) == [f.name for f in fields]
    for f in fields:
        assert params[f.name].kind is inspect.Parameter.KEYWORD_ONLY
        if f.default is not dataclasses.MISSING:
            assert params[f.name].default == f.default
        elif f.default_factory is not dataclasses.MISSING:
            assert params[f.name].default == f.default_factory()
        else:
            assert params[f.name].default is inspect.Parameter.empty
    with pytest.raises(TypeError):
        ChamberReadings("C1", 0.0)  # type: ignore[misc]


def test_every_value_lands_in_its_own_field() -> None:
    values = {
        "chamber": "C3",
        "t_s": 12.5,
        "temperature_c": 19.25,
        "o2_umol_l": 231.0,
        "o2_sat_pct": 91.5,
        "par": 410.0,
        "flow_cm_s": 3.5,
        "level_ok": False,
        "e_stop": True,
        "comm_ok": False,
        "failed": frozenset({Quantity.PAR}),
    }
    reading = ChamberReadings(**values)  # type: ignore[arg-type]
    assert {f.name: getattr(reading, f.name) for f in dataclasses.fields(reading)} == values
    bare = ChamberReadings(chamber="C1", t_s=1.0)
    assert bare.failed == frozenset() and bare.comm_ok is True and bare.temperature_c is None
    assert reading.fresh(Quantity.TEMPERATURE) and not reading.fresh(Quantity.PAR)


def test_it_stays_frozen_and_compares_by_value() -> None:
    reading = ChamberReadings(chamber="C1", t_s=1.0, temperature_c=20.0)
    with pytest.raises(dataclasses.FrozenInstanceError):
        reading.temperature_c = 21.0  # type: ignore[misc]
    with pytest.raises(dataclasses.FrozenInstanceError):
        del reading.par  # type: ignore[misc]
    # a new attribute is refused too (Python 3.11's frozen slots dataclasses raise TypeError
    # from their __setattr__ here, as before this class had its own __init__)
    with pytest.raises((AttributeError, TypeError)):
        reading.extra = 1  # type: ignore[attr-defined]
    twin = ChamberReadings(chamber="C1", t_s=1.0, temperature_c=20.0)
    assert twin == reading and hash(twin) == hash(reading)
    warmer = dataclasses.replace(reading, temperature_c=21.0)
    assert warmer.temperature_c == 21.0 and reading.temperature_c == 20.0 and warmer != reading
    stale = stale_readings("C2", 3.0)
    assert not stale.comm_ok and stale.failed == frozenset(Quantity)
