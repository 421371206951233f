"""Events of the core (livematch.core.events): their constructors, and the exact rounding of
the published records."""

from __future__ import annotations

import dataclasses
import math
import random

import pytest

from livematch.core.events import Assignment, Commit, MatchedFix, rounded


def test_rounded_equals_builtin_round_on_coordinates_and_metres():
    """``rounded`` gives the built-in ``round``'s double (repr equal, so JSON bytes equal)
    for degrees at 1e-7 and metres at 1e-3, random values and exact decimal ties."""
    # Reference: CPython's round(x, n), documented to round the exact value of x half to
    # even and return the float nearest to the decimal result (Python docs, "Built-in
    # Functions: round"); e.g. round(2.675, 2) == 2.67 there.
    rng = random.Random(7)
    values = [rng.uniform(-180.0, 180.0) for _ in range(20_000)]
    values += [rng.uniform(0.0, 50_000.0) for _ in range(20_000)]
    values += [(k + 0.5) / 1e7 for k in range(-2000, 2000)]  # the doubles nearest to ties
    values += [(k + 0.5) / 1e3 for k in range(-20_000, 20_000)]
    values += [k / 1e7 for k in range(-2000, 2000)]
    for x in values:
        for scale, ndigits in ((1e7, 7), (1e3, 3)):
            assert repr(rounded(x, scale, ndigits)) == repr(round(x, ndigits)), (x, ndigits)


@pytest.mark.parametrize("x", [0.0, -0.0, -1e-9, 1e-9, -4e-8, -6e-8, 5e-8, -5e-8, 2.675,
                               math.inf, -math.inf, 1e300, -1e300, 214.74836475, 3e9])
def test_rounded_edge_values(x):
    """Signed zeros, near-zero negatives, a known tie, huge and infinite values: the
    built-in's answer (reference: CPython's round, as above)."""
    for scale, ndigits in ((1e7, 7), (1e3, 3), (1e2, 2)):
        assert repr(rounded(x, scale, ndigits)) == repr(round(x, ndigits))


def test_rounded_nan_stays_nan():
    """NaN in, NaN out, as the built-in."""
    assert math.isnan(rounded(math.nan, 1e7, 7)) and math.isnan(round(math.nan, 7))


@pytest.mark.parametrize(("cls", "args"), [
    (Assignment, ("bus17", 1.5, 7, 12.25, 10.0, -3.0, 15.0, 5, 4.0)),
    (MatchedFix, (1.5, 7, 12.25, 10.0, -3.0)),
    (Commit, ("bus17", (MatchedFix(1.5, 7, 0.0, 1.0, 2.0),), (7, 8))),
])
def test_event_init_equals_generated_dataclass(cls, args):
    """The hand-written __init__ of the per-fix events stores what the standard library's
    generated one would: same repr (kind included), fields, equality; frozen."""
    # Reference: dataclasses.make_dataclass with the same fields and defaults.
    spec = [(f.name, f.type, dataclasses.field(default=f.default, init=f.init))
            for f in dataclasses.fields(cls)]
    twin = dataclasses.make_dataclass(cls.__name__, spec, frozen=True)(*args)
    event = cls(*args)
    assert repr(event) == repr(twin)
    assert dataclasses.astuple(event) == dataclasses.astuple(twin)
    assert event == cls(*args) and event != twin
    with pytest.raises(dataclasses.FrozenInstanceError):
        setattr(event, dataclasses.fields(cls)[0].name, None)
