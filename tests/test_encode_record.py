"""The daemon's published bytes against Python's own JSON encoder.

``encode_record`` promises the bytes of ``json.dumps(record, separators=(",", ":"),
ensure_ascii=False, allow_nan=False)`` (the standard library's ``json`` module, the
reference here, and what ``livematch replay`` writes), and its refusal of NaN and
infinity with the same ``ValueError``. ``plain_json`` (compiled, in
``livematch.core.events``) decides which records msgspec may encode; it is checked here
compiled and as its source loaded as a plain module, against msgspec's and Python's
bytes for the same value.
"""

from __future__ import annotations

import json
import math
from functools import cache
from types import ModuleType
from typing import Any

import msgspec
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from livematch import native
from livematch.core.events import plain_json
from livematch.service.daemon import encode_record


@cache
def pure_events() -> ModuleType:
    """``livematch/core/events.py`` loaded from its source, as a module of its own."""
    return native.source_module("core/events.py", "_pure_livematch_events")


def python_bytes(record: Any) -> bytes:
    """The reference: the standard library's encoder, as ``livematch replay`` calls it."""
    return json.dumps(record, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False).encode("utf-8")


#: Floats on and around every bound where the two encoders part (Python's exponent form
#: below 1e-4 and from 1e16; NaN and infinity), and the extremes of a double.
EDGES = [0.0, -0.0, 1e-4, -1e-4, math.nextafter(1e-4, 0.0), -math.nextafter(1e-4, 0.0),
         9.999e-5, 1e-5, 1e-7, 5e-324, 1e16, -1e16, math.nextafter(1e16, 0.0),
         -math.nextafter(1e16, 0.0), 1.7976931348623157e308, 60.25, 1.8e9 + 0.125,
         float("nan"), float("inf"), float("-inf")]

floats = st.one_of(st.sampled_from(EDGES), st.floats(allow_nan=True, allow_infinity=True))
text = st.text(alphabet=st.characters(exclude_categories=["Cs"]), max_size=8)
scalars = st.one_of(st.none(), st.booleans(), st.integers(-2**70, 2**70), floats, text)
values = st.recursive(
    scalars,
    lambda inner: st.one_of(st.lists(inner, max_size=4),
                            st.lists(inner, max_size=4).map(tuple),
                            st.dictionaries(text, inner, max_size=4)),
    max_leaves=12)
records = st.dictionaries(text, values, max_size=6)


def expect_same(record: Any) -> None:
    """encode_record gives Python's bytes, or raises Python's ValueError."""
    try:
        expected = python_bytes(record)
    except ValueError as exc:
        with pytest.raises(ValueError) as got:
            encode_record(record)
        assert str(got.value) == str(exc)
        return
    assert encode_record(record) == expected


@settings(max_examples=400, deadline=None)
@given(records)
def test_encode_record_is_pythons_json(record: dict[str, Any]) -> None:
    expect_same(record)


@pytest.mark.parametrize("value", EDGES)
def test_every_edge_float_at_any_depth(value: float) -> None:
    for record in ({"x": value}, {"fixes": [{"lat": value, "time": 1.0}]},
                   {"path": [(1, value)]}, {"a": {"b": {"c": [value]}}}):
        expect_same(record)


@settings(max_examples=400, deadline=None)
@given(values)
def test_plain_json_means_msgspec_writes_pythons_bytes(value: Any) -> None:
    """Where plain_json says yes, msgspec's bytes are Python's; both builds agree."""
    plain = plain_json(value)
    assert pure_events().plain_json(value) is plain
    if plain:
        assert msgspec.json.encode(value) == python_bytes(value)


def test_plain_json_refuses_what_it_cannot_vouch_for() -> None:
    """Non-finite and exponent-form floats, subclasses, non-str keys: json.dumps decides."""
    for build in (plain_json, pure_events().plain_json):
        assert build({"t": 1.5, "n": None, "ok": True, "i": 3, "s": "x", "l": [1.0, (2,)]})
        assert not build({"t": float("nan")})
        assert not build({"t": [float("inf")]})
        assert not build({"t": 1e-5})
        assert not build({"t": 1e16})
        assert not build({"t": np.float64(1.5)})  # a float subclass: Python writes it
        assert not build({1: "int key"})
        assert not build({"t": {1.5}})  # a set: json.dumps raises TypeError for it
        assert not build("not a container")
    # and the records the refusals send to json.dumps come out as Python writes them
    expect_same({"t": np.float64(1.5), "u": 1e-5})
    expect_same({1: "int key"})
