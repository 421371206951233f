"""What a tracker keeps per vehicle, made smaller in session 13 (memory, issue 9).

The fix times are one array of doubles for a run of fixes: until session 13 a dict of
sequence number -> float object (about 0.8 KB a live vehicle more, ``bench/memory.py``
step 6). The checks here hold the array against the input itself, the fixes' own times,
and against the state format, which is unchanged. The sweep's weights are no longer a
tuple per tracker: they are written into the network's step scratch when another
tracker's settings wrote it last.
"""

from __future__ import annotations

import json

import pytest

from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.errors import BadStateError
from tests.test_tracker import noisy_drive, run


def test_fix_times_are_the_accepted_fixes_times() -> None:
    """After every fix: a contiguous run of the fixes' own times, newest last, from the
    fix before the oldest not yet committed (what the lag and stand rules read)."""
    net, fixes = noisy_drive(seed=11)
    tracker = Tracker(net, "v1")
    accepted: dict[int, float] = {}  # seq -> the input fix's time
    for fix in fixes:
        seq = tracker.seq
        tracker.update(fix)
        if tracker.seq == seq + 1:
            accepted[tracker.seq] = fix.t
        n = len(tracker.times)
        assert n >= 1
        assert tracker.times0 + n - 1 == tracker.seq
        assert tracker.times0 <= max(1, tracker.next_commit - 1)
        for k in range(tracker.times0, tracker.seq + 1):
            if k in accepted:  # (a spike-dropped fix's number goes to the next fix)
                assert tracker.fix_time(k) == accepted[k]
        assert tracker.fix_time(tracker.times0 - 1) is None
        assert tracker.fix_time(tracker.seq + 1) is None


def test_fix_times_state_bytes_as_a_dict_wrote_them() -> None:
    """The state's ``times`` is ``[[seq...], [t...]]`` exactly as the dict gave it, and a
    restore continues with the same times."""
    net, fixes = noisy_drive(seed=12)
    tracker = Tracker(net, "v1")
    for fix in fixes[:70]:
        tracker.update(fix)
    blob = tracker.to_bytes()
    size = int.from_bytes(blob[5:9], "little")
    state = json.loads(blob[9:9 + size])
    seqs, ts = state["times"]
    assert seqs == list(range(tracker.times0, tracker.seq + 1))
    assert ts == [tracker.fix_time(k) for k in seqs]
    back = Tracker.from_bytes(net, None, blob)
    assert back.times == tracker.times and back.times0 == tracker.times0
    assert back.to_bytes() == blob


def test_fix_times_not_a_run_is_a_bad_state() -> None:
    """A state whose fix times skip a fix (no writer makes one) is refused, clearly."""
    net, fixes = noisy_drive(seed=13)
    tracker = Tracker(net, "v1")
    for fix in fixes[:40]:
        tracker.update(fix)
    blob = tracker.to_bytes()
    size = int.from_bytes(blob[5:9], "little")
    state = json.loads(blob[9:9 + size])
    seqs, ts = state["times"]
    assert len(seqs) >= 2
    for wrong in ([[seqs[0] - 1, *seqs[1:]], ts], [seqs, ts[:-1]]):  # a gap; a time short
        state["times"] = wrong
        header = json.dumps(state, separators=(",", ":")).encode()
        bad = blob[:5] + len(header).to_bytes(4, "little") + header + blob[9 + size:]
        with pytest.raises(BadStateError, match="fix times"):
            Tracker.from_bytes(net, None, bad)


def test_trackers_with_other_settings_interleaved_match_as_alone() -> None:
    """Trackers of different settings on one network, updated in turn, give each the
    events it gives alone (the step scratch's weights follow whose step it is)."""
    net, fixes = noisy_drive(seed=14)
    kinds = [MatchSettings(), MatchSettings(sigma_m=9.0, beta_m=4.0),
             MatchSettings(motion_step=True)]
    alone = [run(Tracker(net, "v", s), fixes) for s in kinds]
    trackers = [Tracker(net, "v", s) for s in kinds]
    together: list[list[object]] = [[] for _ in kinds]
    for fix in fixes:
        for events, tracker in zip(together, trackers, strict=True):
            events.extend(tracker.update(fix))
    for events, tracker in zip(together, trackers, strict=True):
        events.extend(tracker.flush())
    assert together == alone
    assert alone[0] != alone[1]  # the settings do act on this drive


def test_fix_log_holds_the_accepted_fixes_with_bounded_room() -> None:
    """After every fix the fix log's rows in use are the accepted fixes' own positions
    (the input), from at most the fix before the last commit on; its length is at most
    the larger of FIX_LOG_ROOM and the rows in use plus half as many again (at least
    FIX_LOG_ROOM // 2 more)."""
    from livematch.core.tracker import FIX_LOG_ROOM

    net, fixes = noisy_drive(seed=5, n_legs=20)
    tracker = Tracker(net, "v1", MatchSettings(max_lag_fixes=20))
    accepted: dict[int, tuple[float, float]] = {}  # seq -> the input fix's position
    for fix in fixes:
        seq = tracker.seq
        tracker.update(fix)
        if tracker.seq == seq + 1:
            accepted[tracker.seq] = (fix.x, fix.y)
        n, seq0, log = tracker.fix_n, tracker.fix_seq0, tracker.fix_xy
        assert seq0 + n - 1 == tracker.seq
        assert seq0 <= max(1, tracker.next_commit - 1)
        for k in range(seq0, tracker.seq + 1):
            if k in accepted:  # (a spike-dropped fix's number goes to the next fix)
                assert tuple(log[k - seq0].tolist()) == accepted[k]
        # sized when it last filled up, for at most the rows in use now (until session
        # 23 twice the rows kept: 40 rows for 20)
        assert len(log) <= max(FIX_LOG_ROOM, n + max(FIX_LOG_ROOM // 2, n // 2))
    assert len(accepted) > 300


def test_fix_log_room_follows_the_rows_kept() -> None:
    """The fix log on its own, against a plain list of the positions logged: with the
    last commit lagging 0-40 fixes behind, the rows in use are always the positions from
    at most the fix before that commit on, in order, and the log's length is at most the
    larger of FIX_LOG_ROOM and the rows in use plus half as many again (at least
    FIX_LOG_ROOM // 2 more)."""
    import numpy as np

    from livematch.core.tracker import FIX_LOG_ROOM

    net, _ = noisy_drive(seed=1)
    tracker = Tracker(net, "v1")
    rng = np.random.default_rng(4)
    logged: list[tuple[float, float]] = []
    lag = 0
    for seq in range(1, 600):
        if seq % 25 == 0:
            lag = int(rng.integers(0, 41))
        tracker.seq = seq
        tracker.next_commit = max(tracker.next_commit, seq - lag)  # commits only advance
        xy = (float(rng.normal(0.0, 100.0)), float(rng.normal(0.0, 100.0)))
        tracker._log_fix(*xy)
        logged.append(xy)
        n, seq0, log = tracker.fix_n, tracker.fix_seq0, tracker.fix_xy
        assert seq0 + n - 1 == seq
        assert seq0 <= max(1, tracker.next_commit - 1)
        assert [tuple(r) for r in log[:n].tolist()] == logged[seq0 - 1:]
        # until session 23 the room was as many rows again as were kept (40 for 20)
        assert len(log) <= max(FIX_LOG_ROOM, n + max(FIX_LOG_ROOM // 2, n // 2))
