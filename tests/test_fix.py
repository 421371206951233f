"""The position fix (livematch.core.fix): a frozen slotted dataclass (compiled with mypyc)."""

from __future__ import annotations

import dataclasses
import pickle

import pytest

from livematch.core.fix import Fix

# Reference: the dataclass the standard library generates for the same fields (its own
# __init__, equality and repr), built here with dataclasses.make_dataclass.
Twin = dataclasses.make_dataclass(
    "Fix", [(f.name, f.type, f.default) if f.default is not dataclasses.MISSING
            else (f.name, f.type) for f in dataclasses.fields(Fix)],
    frozen=True, slots=True)


@pytest.mark.parametrize(("args", "kwargs"), [
    (("bus17", 1.5, 24.9, 60.1, 10.0, -3.0), {}),
    (("bus17", 1.5, 24.9, 60.1, 10.0, -3.0, 8.0, 11.2, 274.0, "550"), {}),
    (("van3", 2.0, 0.0, 0.0, 0.0, 0.0), {"heading": 90.0, "route": "R"}),
])
def test_fix_init_equals_generated_dataclass(args, kwargs):
    """Positional and keyword construction store the same fields as the generated
    __init__ of the same dataclass; repr, fields and defaults are the same."""
    fix, twin = Fix(*args, **kwargs), Twin(*args, **kwargs)
    assert dataclasses.astuple(fix) == dataclasses.astuple(twin)
    assert repr(fix) == repr(twin)
    assert fix == Fix(*args, **kwargs) and hash(fix) == hash(Fix(*args, **kwargs))
    assert pickle.loads(pickle.dumps(fix)) == fix


def test_fix_is_frozen_and_checks_arguments():
    """Fields cannot be set afterwards; a missing or unknown argument is a TypeError."""
    fix = Fix("bus17", 1.0, 24.9, 60.1, 0.0, 0.0)
    with pytest.raises(dataclasses.FrozenInstanceError):
        fix.t = 2.0  # type: ignore[misc]
    with pytest.raises(TypeError):
        Fix("bus17", 1.0, 24.9, 60.1, 0.0)  # type: ignore[call-arg]
    with pytest.raises(TypeError):
        Fix("bus17", 1.0, 24.9, 60.1, 0.0, 0.0, colour="red")  # type: ignore[call-arg]
    assert dataclasses.replace(fix, t=5.0) == Fix("bus17", 5.0, 24.9, 60.1, 0.0, 0.0)
