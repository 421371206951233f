"""``hold_filtered``: a fix the filters refuse gets the newest live answer again.

Plain data: a straight road and fixes along it every second, one of them made an outlier
(900 m off in 1 s, refused as ``impossible_jump``) or given a poor reported accuracy
(refused as ``low_accuracy``). The certificate the repeated answer carries is checked
against shapely's ``frechet_distance`` (an outside reference; shapely computes the
discrete Fréchet distance, so both curves are densified to 0.5 m steps and the bound
is widened by the step).
"""

from __future__ import annotations

from shapely import LineString, frechet_distance, segmentize

from livematch.core.events import Assignment, Filtered, HeldAssignment, to_record
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from tests.catalogue import fixes_along, straight_road

HOLD = MatchSettings(hold_filtered=True)
DENSIFY_M = 0.5


def _feed(tracker: Tracker, fixes: list[Fix]) -> list:
    events: list = []
    for f in fixes:
        events.extend(tracker.update(f))
    return events


def _trip(bad_at: int = 20, outlier: bool = True) -> list[Fix]:
    """40 fixes 10 m apart along the road; fix ``bad_at`` refused by a filter."""
    fixes = fixes_along([(float(x), 2.0) for x in range(100, 500, 10)])
    bad = fixes[bad_at]
    if outlier:
        fixes[bad_at] = Fix(bad.vehicle, bad.t, 0.0, 0.0, bad.x, 900.0)
    else:
        fixes[bad_at] = Fix(bad.vehicle, bad.t, 0.0, 0.0, bad.x, bad.y, accuracy=500.0)
    return fixes


def _at(events: list, t: float) -> list[Assignment]:
    return [e for e in events if isinstance(e, Assignment) and e.t == t]


def test_refused_outlier_repeats_the_newest_answer_with_its_certificate() -> None:
    net = straight_road(2000.0)
    fixes = _trip()
    bad, before = fixes[20], fixes[19]
    tracker = Tracker(net, "v1", HOLD)
    events = _feed(tracker, fixes[:20])
    own = tracker.update(bad)  # the refused fix's own events
    events += own + _feed(tracker, fixes[21:])
    (held,) = _at(events, bad.t)
    (last,) = _at(events, before.t)
    assert (held.segment, held.offset_m, held.x, held.y) == (
        last.segment, last.offset_m, last.x, last.y)
    assert (held.eps_m, held.window_fixes, held.window_s) == (
        last.eps_m, last.window_fixes, last.window_s)
    # after the refusal, so a consumer pairing fixes with events sees the refusal first
    assert [type(e).__name__ for e in own] == ["Filtered", "HeldAssignment"]
    # the certificate: the window's fixes (accepted, ending at the fix before the refused
    # one) lie within eps of the road from the first window fix's foot to the held point
    window = fixes[20 - held.window_fixes:20]
    assert len(window) == held.window_fixes >= 2
    curve = LineString([(f.x, f.y) for f in window])
    road = LineString([(window[0].x, 0.0), (held.x, held.y)])
    # both curves densified to DENSIFY_M steps by shapely.segmentize, then shapely's
    # discrete distance on their vertices (its own densify fraction is very slow this fine)
    assert frechet_distance(segmentize(curve, DENSIFY_M), segmentize(road, DENSIFY_M)) \
        <= held.eps_m + DENSIFY_M
    # the refused fix is in no window: it is nowhere near that road (10 m steps: the
    # discrete distance exceeds the continuous one by at most the step)
    outlier = LineString([*curve.coords, (bad.x, bad.y)])
    assert frechet_distance(segmentize(outlier, 10.0), segmentize(road, 10.0)) \
        > held.eps_m + 10.0


def test_refused_low_accuracy_fix_is_held_too() -> None:
    net = straight_road(2000.0)
    fixes = _trip(outlier=False)
    events = _feed(Tracker(net, "v1", HOLD), fixes)
    assert [e.reason for e in events if isinstance(e, Filtered)] == ["low_accuracy"]
    (held,) = _at(events, fixes[20].t)
    assert held.segment == _at(events, fixes[19].t)[0].segment


def test_off_no_answer_and_final_answers_unchanged() -> None:
    net = straight_road(2000.0)
    fixes = _trip()
    off = Tracker(net, "v1", MatchSettings(hold_filtered=False))
    on = Tracker(net, "v1", HOLD)
    ev_off = _feed(off, fixes) + off.flush()
    ev_on = _feed(on, fixes) + on.flush()
    assert _at(ev_off, fixes[20].t) == []
    assert [e for e in ev_on if not (isinstance(e, Assignment) and e.t == fixes[20].t)] \
        == ev_off
    # every fix, the refused one included, has exactly one live answer with the setting
    assert sorted(e.t for e in ev_on if isinstance(e, Assignment)) == [f.t for f in fixes]


def test_no_answer_to_repeat_when_it_is_older_than_gap_s() -> None:
    net = straight_road(2000.0)
    fixes = fixes_along([(float(x), 2.0) for x in range(100, 200, 10)])
    late = fixes[-1]
    # gap_s (10 s) after the newest accepted fix and more: a gap, nothing repeated
    stale = Fix("v1", late.t + HOLD.gap_s + 1.0, 0.0, 0.0, late.x, late.y, accuracy=500.0)
    fresh = Fix("v1", late.t + 1.0, 0.0, 0.0, late.x, late.y, accuracy=500.0)
    tr = Tracker(net, "v1", HOLD)
    _feed(tr, fixes)
    assert len(_at(tr.update(fresh), fresh.t)) == 1
    assert _at(tr.update(stale), stale.t) == []


def test_first_fix_refused_has_nothing_to_repeat() -> None:
    net = straight_road(2000.0)
    tr = Tracker(net, "v1", HOLD)
    events = tr.update(Fix("v1", 1_700_000_000.0, 0.0, 0.0, 100.0, 2.0, accuracy=500.0))
    assert [type(e).__name__ for e in events] == ["Filtered"]


def test_restore_mid_trip_continues_identically() -> None:
    """The answer to repeat is part of the state: restored right after the fix before the
    refused one, the tracker publishes the same events as one never stopped."""
    net = straight_road(2000.0)
    fixes = _trip()
    whole = Tracker(net, "v1", HOLD)
    expected = _feed(whole, fixes) + whole.flush()
    first = Tracker(net, "v1", HOLD)
    head = _feed(first, fixes[:20])
    for compress in (False, True):
        again = Tracker.from_bytes(net, HOLD, first.to_bytes(compress=compress))
        assert head + _feed(again, fixes[20:]) + again.flush() == expected


def test_held_answer_is_marked_in_the_published_record() -> None:
    """A repeated answer is published with ``"held": true``; an ordinary one has no such
    key (the assignment contract's other fields are the same for both)."""
    net = straight_road(2000.0)
    fixes = _trip()
    tracker = Tracker(net, "v1", HOLD)
    events = _feed(tracker, fixes)
    (held,) = _at(events, fixes[20].t)
    (last,) = _at(events, fixes[19].t)
    assert type(held) is HeldAssignment and type(last) is Assignment
    rec_held, rec_last = to_record(held, net), to_record(last, net)
    assert rec_held.pop("held") is True and "held" not in rec_last
    assert rec_held.keys() == rec_last.keys()
    assert (rec_held["lat"], rec_held["lon"]) == (rec_last["lat"], rec_last["lon"])
