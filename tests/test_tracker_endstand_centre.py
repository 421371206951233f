"""``end_stand_centre``: a stand at the end of the log is read about the centre of its fixes.

Outside reference: shapely places each reported point on the road line it names and
measures it against its fix; numpy's median and distances check that the fixture's
stand is the case the rule is for (its fixes within 2 sigma_m of their median, one of
them farther than that from the last fix); Python's statistics.median checks the
tracker's own median.
"""

from __future__ import annotations

import random
import statistics

import numpy as np
import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Event
from livematch.core.settings import MatchSettings
from livematch.core.tracker import _median
from tests.catalogue import committed_path as path
from tests.catalogue import final_answers as finals
from tests.catalogue import seg_of, track_points

# P runs east into the junction V = (100, 0); T goes on east from V (a way of its own,
# as the map draws a street past a junction), S leaves V north.
P = [(-1000.0, 0.0), (100.0, 0.0)]
T = [(100.0, 0.0), (104.5, 0.0), (400.0, 0.0)]
S = [(100.0, 0.0), (100.0, 300.0)]
NET = network_from_roads([Road(P, way=1), Road(T, way=2), Road(S, way=3)])
EPS = 15.0
SIGMA = 5.0  # MatchSettings' default sigma_m
ON = MatchSettings(end_stand_centre=True)
OFF = MatchSettings(end_stand_centre=False)


P_EAST = seg_of(NET, P[0], P[1])

# a van at 10 m/s along P, a fix every 5 s; it stops at V and the log ends while it
# stands (60 s). Its fixes scatter about V: one lies 5.5 m past V on T, the last 4.5 m
# short of it on P, 10.2 m apart (more than 2 sigma_m), as the simulator's correlated
# GNSS error scatters a stand's fixes.
DRIVE = [(-200.0 + 50.0 * i, 1.0) for i in range(6)]
STAND = [(97.0, 0.5), (103.0, -1.0), (105.5, 1.0), (102.0, 0.5), (101.5, -1.5),
         (100.5, 0.5), (98.5, -1.5), (99.0, 1.0), (97.5, 0.5), (98.0, -1.0),
         (96.5, 1.0), (95.5, -1.0)]
PTS = DRIVE + STAND
DT = 5.0
STAND_T = [DT * (len(DRIVE) + k) for k in range(len(STAND))]


def run(settings: MatchSettings, pts: list[tuple[float, float]] = PTS,
        dt: float = DT) -> list[Event]:
    """Fixes ``pts`` ``dt`` seconds apart, then the end-of-log flush."""
    return track_points(NET, settings, pts, dt)


def test_fixture_is_a_stand_about_its_centre_but_not_about_its_last_fix() -> None:
    """The stand's fixes lie within 2 sigma_m of their median; one lies farther from the last."""
    xy = np.array(STAND)
    centre = np.median(xy, axis=0)  # numpy
    assert np.all(np.hypot(*(xy - centre).T) <= 2 * SIGMA)
    assert np.hypot(*(xy[2] - xy[-1])) > 2 * SIGMA


def test_without_the_rule_the_stand_ends_past_the_junction() -> None:
    """The case the rule is for: the flush leaves the stand's last answers on T, past V."""
    got = finals(run(OFF))
    on_t = [t for t in STAND_T if got[t][0] != P_EAST]
    assert on_t  # some of the stand is answered past V
    line_p = shapely.LineString(P)
    assert any(line_p.distance(shapely.Point(got[t][2:])) > 1.0 for t in on_t)  # shapely


def test_rule_reports_the_stand_on_the_road_it_came_in_by() -> None:
    """With the rule every answer of the stand lies on P (at V or short of it), within eps."""
    events = run(ON)
    got = finals(events)
    line_p = shapely.LineString(P)
    for t, fix in zip(STAND_T, STAND, strict=True):
        seg, offset, x, y = got[t]
        assert seg == P_EAST, t
        point = shapely.Point(x, y)
        assert line_p.distance(point) == pytest.approx(0.0, abs=1e-9)  # shapely
        assert point.distance(shapely.Point(fix)) <= EPS  # shapely
        assert offset == pytest.approx(line_p.project(point), abs=1e-6)  # shapely


def test_rule_changes_answers_only() -> None:
    """The committed path and every answer before the stand are as without the rule."""
    on, off = run(ON), run(OFF)
    assert path(on) == path(off)
    got_on, got_off = finals(on), finals(off)
    assert set(got_on) == set(got_off)
    for t in got_on:
        if t < STAND_T[0]:
            assert got_on[t] == got_off[t]


def test_rule_leaves_sparse_fixes_alone() -> None:
    """At 15 s between fixes (not dense) the flush commits the same with and without."""
    sparse = [(-200.0 + 150.0 * i, 1.0) for i in range(3)] + STAND[::3]
    assert run(ON, sparse, 15.0) == run(OFF, sparse, 15.0)


def test_rule_does_nothing_where_the_stand_is_read_from_the_last_fix_alike() -> None:
    """A stand whose fixes all lie within 2 sigma_m of the last one: the same outputs."""
    tight = DRIVE + [(100.0 + 0.5 * (k % 3), 0.5 * (k % 2)) for k in range(10)]
    assert run(ON, tight) == run(OFF, tight)


def test_end_stand_centre_is_on_by_default_and_validated() -> None:
    """end_stand_centre must be a boolean and is on by default."""
    assert MatchSettings().end_stand_centre is True
    problems = MatchSettings(end_stand_centre=1).problems()  # type: ignore[arg-type]
    assert ("end_stand_centre", "must be true or false, got 1") in problems


def test_median_is_the_standard_librarys() -> None:
    """The rule's centre uses the same median as Python's statistics.median (outside reference)."""
    rng = random.Random(7)
    for n in range(1, 40):
        values = [rng.uniform(-500.0, 500.0) for _ in range(n)]
        assert _median(values) == statistics.median(values)  # exactly: the same formula
