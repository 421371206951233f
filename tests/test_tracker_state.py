"""The tracker's serialised state (``LMT6``): both encodings, older versions, corruption."""

from __future__ import annotations

import importlib.resources
import json
from pathlib import Path

import numpy as np
import pytest

from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.errors import BadStateError
from tests.test_tracker import noisy_drive, run

STATES = Path(__file__).parent / "data" / "states"


def _test_extract_drive(every: int) -> tuple[RoadNetwork, list[Fix]]:
    """The simulated bus-7 drive the stored states were written on (pyrosm's test extract,
    © OpenStreetMap contributors, ODbL), one fix every ``every`` s."""
    from livematch.mapdata.netfile import open_network
    from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive

    net = open_network(str(importlib.resources.files("pyrosm") / "data" / "test.osm.pbf"))
    d = simulate_drive(net, np.random.default_rng([41, 77]), "bus-7", 1.7e9,
                       DriveSettings(duration_s=240.0 if every == 1 else 900.0),
                       drivable_segments(net))
    return net, [Fix(d.vehicle, o.t, 0.0, 0.0, o.x, o.y, o.accuracy) for o in observe(d, every)]


def _stored_state(name: str, every: int, magic: str
                  ) -> tuple[RoadNetwork, list[Fix], bytes, MatchSettings]:
    """A state kept in tests/data/states (its drive, its bytes, checked to start with
    ``magic``, and the settings it was written with, from ``<magic>-settings.json``)."""
    net, fixes = _test_extract_drive(every)
    blob = (STATES / name).read_bytes()
    assert blob[:4] == magic.encode()
    then = json.loads((STATES / f"{magic.lower()}-settings.json").read_text(encoding="utf-8"))
    return net, fixes, blob, MatchSettings(**{**then, "eps_levels": tuple(then["eps_levels"])})


def test_state_compressed_is_smaller_and_same_content() -> None:
    """The zlib form holds the same state as the plain one, in fewer bytes."""
    net, fixes = noisy_drive(seed=5)
    tracker = Tracker(net, "v1")
    run(tracker, fixes[:80], flush=False)
    plain, packed = tracker.to_bytes(), tracker.to_bytes(compress=True)
    assert len(packed) < len(plain)
    assert Tracker.from_bytes(net, None, packed).to_bytes() == plain


@pytest.mark.parametrize(("name", "every", "cut"), [
    ("test-osm-bus7-fix120.lmt3", 1, 120), ("test-osm-bus7-10s-fix30.lmt3", 10, 30)])
def test_state_reads_older_lmt3(name: str, every: int, cut: int) -> None:
    """An LMT3 checkpoint continues like a run never saved, and is rewritten as LMT6.

    tests/data/states/*.lmt3 were written by the LMT3 code (commit fb7def4, its default
    settings, kept in lmt3-settings.json) after ``cut`` fixes of the simulated drive; the
    10 s one holds the spike test's copy of the levels.
    """
    net, fixes = _test_extract_drive(every)
    blob = (STATES / name).read_bytes()
    assert blob[:4] == b"LMT3"
    then = json.loads((STATES / "lmt3-settings.json").read_text(encoding="utf-8"))
    # hold_filtered came later (such a state holds no answer to repeat): off, as then
    settings = MatchSettings(**{"hold_filtered": False, **then,
                                "eps_levels": tuple(then["eps_levels"])})
    straight = Tracker(net, "bus-7", settings)
    run(straight, fixes[:cut], flush=False)
    restored = Tracker.from_bytes(net, settings, blob)
    assert (restored.before is not None) == (every == 10)
    assert restored.to_bytes() == straight.to_bytes()
    assert run(restored, fixes[cut:]) == run(straight, fixes[cut:])
    assert restored.to_bytes() == straight.to_bytes()
    assert restored.to_bytes()[:4] == b"LMT6"


@pytest.mark.parametrize(("name", "every", "cut"), [
    ("test-osm-bus7-fix120.lmt4", 1, 120), ("test-osm-bus7-10s-fix30.lmt4", 10, 30)])
def test_state_reads_older_lmt4(name: str, every: int, cut: int) -> None:
    """An LMT4 checkpoint (each tree row with its fix's time) continues like a run never
    saved, and is rewritten as LMT6 (one time per fix).

    tests/data/states/*.lmt4 were written by the LMT4 code (commit d5bf8d6, its default
    settings, kept in lmt4-settings.json, ``hold_filtered`` on: the states hold an answer
    to repeat) after ``cut`` fixes of the simulated drive; the 10 s one holds the spike
    test's copy of the levels.
    """
    net, fixes, blob, settings = _stored_state(name, every, "LMT4")
    straight = Tracker(net, "bus-7", settings)
    run(straight, fixes[:cut], flush=False)
    restored = Tracker.from_bytes(net, settings, blob)
    assert (restored.before is not None) == (every == 10)
    assert restored.said is not None
    assert restored.to_bytes() == straight.to_bytes()
    # the trees give every row the time of its fix, as the fix log has it
    for tree in [lv.tree for lv in restored.levels] + (
            [lv.tree for lv in restored.before.levels] if restored.before else []):
        for row in range(tree.n):
            seq = tree.seq_of(row)
            t = restored.fix_time(seq)
            if t is not None:
                assert tree.time_of(seq) == t
    assert run(restored, fixes[cut:]) == run(straight, fixes[cut:])
    assert restored.to_bytes() == straight.to_bytes()
    assert restored.to_bytes()[:4] == b"LMT6"


@pytest.mark.parametrize(("name", "every", "cut"), [
    ("test-osm-bus7-fix120.lmt5", 1, 120), ("test-osm-bus7-10s-fix30.lmt5", 10, 30)])
def test_state_reads_older_lmt5(name: str, every: int, cut: int) -> None:
    """An LMT5 checkpoint (low, pos and cost in every tree row) continues like a run never
    saved, and is rewritten as LMT6 (low and cost of the live rows only).

    tests/data/states/*.lmt5 were written by the LMT5 code (commit 2244400, its default
    settings, kept in lmt5-settings.json) after ``cut`` fixes of the simulated drive;
    the 10 s one holds the spike test's copy of the levels.
    """
    net, fixes, blob, settings = _stored_state(name, every, "LMT5")
    straight = Tracker(net, "bus-7", settings)
    run(straight, fixes[:cut], flush=False)
    restored = Tracker.from_bytes(net, settings, blob)
    assert (restored.before is not None) == (every == 10)
    assert restored.to_bytes() == straight.to_bytes()
    assert restored.to_bytes()[:4] == b"LMT6"
    # shorter: 16 bytes fewer for every row that is not live
    rows = sum(lv.tree.n - len(lv.tree) for lv in restored.levels)
    assert rows > 0 and len(restored.to_bytes()) < len(blob)
    assert run(restored, fixes[cut:]) == run(straight, fixes[cut:])
    assert restored.to_bytes() == straight.to_bytes()


@pytest.mark.parametrize(("name", "every", "cut"), [
    ("test-osm-bus7-fix120.lmt6", 1, 120), ("test-osm-bus7-10s-fix30.lmt6", 10, 30)])
def test_state_lmt6_bytes_as_before_rows_kept_their_fix(name: str, every: int,
                                                      cut: int) -> None:
    """LMT6 is written byte for byte as before the trees' rows stopped keeping their fix.

    tests/data/states/*.lmt6 were written by the code before (main 20862f2, its default
    settings, kept in lmt6-settings.json: each row of a state's trees ``seg, seq,
    parent, via_end``) after ``cut`` fixes of the simulated drive; this code, rows of
    ``seg, parent, via_end`` and each fix's first row, writes the same bytes after the
    same fixes, reads them back into the same trees, and goes on as a run never saved.
    """
    net, fixes, blob, settings = _stored_state(name, every, "LMT6")
    straight = Tracker(net, "bus-7", settings)
    run(straight, fixes[:cut], flush=False)
    assert straight.to_bytes() == blob
    restored = Tracker.from_bytes(net, settings, blob)
    assert (restored.before is not None) == (every == 10)
    assert restored.to_bytes() == blob
    # every row of the restored trees has its fix's time, as the fix log has it
    for tree in [lv.tree for lv in restored.levels] + (
            [lv.tree for lv in restored.before.levels] if restored.before else []):
        for row in range(tree.n):
            t = restored.fix_time(tree.seq_of(row))
            if t is not None:
                assert tree.time_of(tree.seq_of(row)) == t
    assert run(restored, fixes[cut:]) == run(straight, fixes[cut:])
    assert restored.to_bytes() == straight.to_bytes()


def test_state_corrupt_lmt5_is_a_bad_state() -> None:
    """Unknown flags, a cut header, cut arrays or a broken zlib stream: BadStateError."""
    net, fixes = noisy_drive(seed=3)
    tracker = Tracker(net, "v1")
    run(tracker, fixes[:40], flush=False)
    plain, packed = tracker.to_bytes(), tracker.to_bytes(compress=True)
    header = int.from_bytes(plain[5:9], "little")
    assert len(plain) > 9 + header + 44  # a tree row at least follows the header
    for bad in (plain[:4] + b"\x07" + plain[5:], plain[:4], plain[:9 + header // 2],
                plain[:-20], packed[:-20], plain[:4] + b"\x01" + plain[5:]):
        with pytest.raises(BadStateError):
            Tracker.from_bytes(net, None, bad)
    # a tree's first row (seg, seq, parent, via_end) given a fix after the others': the
    # rows are no longer in fix order, which the trees rely on (each fix's first row)
    at = 9 + header + 4
    late = (2**30).to_bytes(4, "little")
    with pytest.raises(BadStateError, match="fix order"):
        Tracker.from_bytes(net, None, plain[:at] + late + plain[at + 4:])


def test_state_skips_empty_parts() -> None:
    """A fresh tracker's state is small and restores to a tracker with shared empties."""
    net, _ = noisy_drive(seed=1)
    fresh = Tracker(net, "v1")
    blob = fresh.to_bytes()
    assert len(blob) < 400
    back = Tracker.from_bytes(net, None, blob)
    assert back.to_bytes() == blob
    assert all(lv.tree.ti is fresh.levels[0].tree.ti for lv in back.levels)


def test_state_restore_with_held_fix_and_pending_filtered_fix() -> None:
    """A state taken while a late fix is held back (``reorder_fixes``) and a filtered fix
    awaits its final answer restores to the same bytes and continues exactly (both are
    kept as tuples, shared when empty)."""
    net, fixes = noisy_drive(seed=5)
    settings = MatchSettings(reorder_fixes=2, max_accuracy_m=50.0)
    feed = list(fixes[:60])
    feed[38] = Fix(feed[38].vehicle, feed[38].t, 0.0, 0.0, feed[38].x, feed[38].y, 80.0)
    feed[40], feed[41] = feed[41], feed[40]  # one fix a place late
    straight = Tracker(net, "v1", settings)
    whole = run(straight, feed)
    first = Tracker(net, "v1", settings)
    before = run(first, feed[:41], flush=False)
    assert first.buffer and first.skipped  # a fix held back, a filtered one pending
    restored = Tracker.from_bytes(net, settings, first.to_bytes())
    assert restored.buffer == first.buffer and restored.skipped == first.skipped
    assert restored.to_bytes() == first.to_bytes()
    assert before + run(restored, feed[41:]) == whole
    assert restored.to_bytes() == straight.to_bytes()
    assert straight.buffer == () and straight.skipped == ()


@pytest.mark.pure_python
def test_state_restore_shares_equal_numbers() -> None:
    """A restored tracker holds one object per distinct fix time and sequence number, as
    a tracker driven fix by fix does (the JSON header gives each occurrence its own)."""
    net, fixes = noisy_drive(seed=7)
    first = Tracker(net, "v1")
    run(first, fixes[:50], flush=False)
    restored = Tracker.from_bytes(net, None, first.to_bytes())
    assert restored.last is not None and restored.last_released_t is not None
    assert restored.last_released_t is restored.last[0]
    assert restored.fix_time(restored.seq) == restored.last[0]
    assert restored.times0 == first.times0 and restored.times == first.times
    assert restored.to_bytes() == first.to_bytes()


def test_fields_kept_unboxed_read_none_until_set() -> None:
    """The fields kept as plain tuples and floats (none: a NaN or a -1) read None until set.

    ``last``, ``last_commit``, ``stand_from``, ``speed``, ``last_released_t`` and
    ``stood_t`` are stored without ``None`` so that the compiled tracker keeps them
    unboxed; each is read and written through a property that turns the stored "none"
    into ``None`` and back. A state round trip keeps them (the stored states themselves
    are checked byte for byte above).
    """
    net, fixes = noisy_drive(seed=7)
    tracker = Tracker(net, "v1", MatchSettings(stop_turns=True))
    names = ("last", "last_commit", "stand_from", "speed", "last_released_t", "stood_t")
    assert [getattr(tracker, n) for n in names] == [None] * len(names)
    assert tracker.last_time is None
    run(tracker, fixes[:60], flush=False)
    last = fixes[59]
    assert tracker.last == (last.t, last.x, last.y)
    assert tracker.last_time == last.t == tracker.last_released_t
    assert tracker.last_commit is not None and tracker.last_commit[2] >= 1
    assert tracker.stand_from is not None and tracker.speed is not None
    restored = Tracker.from_bytes(net, None, tracker.to_bytes())
    assert [getattr(restored, n) for n in names] == [getattr(tracker, n) for n in names]
    for n in names:
        setattr(restored, n, None)
        assert getattr(restored, n) is None
    assert restored.last_time is None
