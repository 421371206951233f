"""``live_keep_stand_s``: the live hysteresis (``live_keep``) only while the vehicle stands.

Plain data as in ``tests/test_tracker_livekeep.py``: two straight two-way roads 10 m
apart (way 1 along y = 0, way 2 along y = 10), fixes every second. The stand test
(:meth:`Tracker._stood_for`) is checked against shapely: a fix "near" the newest one is
one within 2 sigma_m of it by shapely's ``distance``, as is the moving fixes' spacing.
"""

from __future__ import annotations

from shapely import Point

from livematch.core.events import Assignment, Commit, Event
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.tracker import STAND_SIGMAS, Tracker
from tests.catalogue import fixes_along
from tests.test_tracker_livekeep import LEAN, _fixes, _live_ways, _roads


def _run(fixes: list[Fix], settings: MatchSettings) -> list[Event]:
    tracker = Tracker(_roads(), "v1", settings)
    events: list[Event] = []
    for f in fixes:
        events.extend(tracker.update(f))
    return events + tracker.flush()


def _feed(fixes: list[Fix], settings: MatchSettings | None = None) -> Tracker:
    tracker = Tracker(_roads(), "v1", settings)
    for f in fixes:
        tracker.update(f)
    return tracker


def _inside(fixes: list[Fix], sigma_m: float) -> list[bool]:
    """Whether each fix lies within STAND_SIGMAS sigma_m of the last (shapely distance)."""
    last = Point(fixes[-1].x, fixes[-1].y)
    return [last.distance(Point(f.x, f.y)) <= STAND_SIGMAS * sigma_m for f in fixes]


def test_a_stand_is_told_by_the_fixes_of_the_window() -> None:
    sigma = MatchSettings().sigma_m
    # 25 s standing at x = 300 with the fixes scattered up to 3 m about it (on way 1's
    # side), preceded by driving at 10 m/s
    drive = [(100.0 + 10.0 * i, 2.0) for i in range(20)]
    stand = [(300.0 + (i % 3), 2.0 + (i % 2) * 2.0) for i in range(25)]
    fixes = fixes_along(drive + stand)
    tracker = _feed(fixes)
    # shapely: the fixes of the last 20 s all lie within 2 sigma of the newest, the one
    # 30 s back (still driving) does not
    assert all(_inside(fixes[-21:], sigma))
    assert not _inside(fixes[-31:], sigma)[0]
    assert tracker._stood_for(10.0) and tracker._stood_for(20.0)
    assert not tracker._stood_for(30.0)
    # one fix 12 m off inside the window (shapely: outside the disc) and it did not stand
    odd = drive + stand
    odd[-5] = (312.0, 2.0)
    fixes_odd = fixes_along(odd)
    assert not _inside(fixes_odd, sigma)[-5]
    assert not _feed(fixes_odd)._stood_for(10.0)


def test_a_moving_lean_is_left_to_the_plain_ranking() -> None:
    """While driving (fixes 10 m apart, so the fix 10 s back is 100 m away) the bound
    lets no keep act: the one-fix lean onto way 2 flips the live answer as without the
    rule; with the bound off (0) the rule keeps way 1 (``tests/test_tracker_livekeep.py``)."""
    fixes = _fixes([2.0] * LEAN + [10.0] + [2.0] * 15)
    back = fixes[LEAN - 10]
    # shapely: the fix 10 s before the lean lies 100 m from it, far outside 2 sigma_m
    assert Point(back.x, back.y).distance(Point(fixes[LEAN].x, fixes[LEAN].y)) > \
        STAND_SIGMAS * MatchSettings().sigma_m
    net = _roads()
    plain = _run(fixes, MatchSettings())
    bounded = _run(fixes, MatchSettings(live_keep=3.0, live_keep_stand_s=10.0))
    unbounded = _run(fixes, MatchSettings(live_keep=3.0))
    assert _live_ways(net, bounded) == _live_ways(net, plain)
    assert _live_ways(net, bounded)[LEAN] == 2
    assert _live_ways(net, unbounded) == [1] * len(fixes)
    # final answers are the same either way
    assert [e for e in bounded if isinstance(e, Commit)] == \
        [e for e in plain if isinstance(e, Commit)]
    assert sum(isinstance(e, Assignment) for e in bounded) == len(fixes)


def test_the_bound_is_off_by_default_and_refuses_negatives() -> None:
    assert MatchSettings().live_keep_stand_s == 0.0
    assert "live_keep_stand_s" in dict(MatchSettings(live_keep_stand_s=-1.0).problems())
    assert not MatchSettings(live_keep=15.0, live_keep_stand_s=10.0).problems()
