"""Rule ``class_cost_m``: a per-fix charge on candidate states on minor road classes.

The plain case: a residential street east along y = 0 and a service road drawn 3 m north
of it between x = 100 and x = 500, leaving the street there and joining it again (the
map draws such a pair in central Helsinki: docs/measured.md, "Session 17 (fleet1hz)").
The vehicle drives the street at 10 m/s, one fix a second, and its GNSS error leans 2 m
north the whole time (the correlated error of ``bench/accuracy.py``'s drives leans one
way for tens of seconds), so every fix lies 1 m from the service road and 2 m from the
street: both stay within eps, and the path cost, which charges each fix's offset, prefers
the service road.
"""

from __future__ import annotations

import numpy as np
import pytest
import shapely

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Event
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork, minor_segments
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from tests.catalogue import committed_path, final_answers, track_points

STREET, SERVICE = 1, 2
APART_M = 3.0
LEAN_M = 2.0
EPS_M = 15.0  # the smallest level of the default ladder
ON = MatchSettings(class_cost_m=3.0)


def _street_and_service() -> RoadNetwork:
    street = Road([(float(x), 0.0) for x in range(0, 601, 50)], way=STREET,
                  name="Street", highway="residential")
    service = Road([(100.0, 0.0), (115.0, APART_M)]
                   + [(float(x), APART_M) for x in range(150, 451, 50)]
                   + [(485.0, APART_M), (500.0, 0.0)], way=SERVICE, highway="service")
    return network_from_roads([street, service])


def _pts() -> list[tuple[float, float]]:
    return [(10.0 * i, LEAN_M) for i in range(61)]


def _ways(net: RoadNetwork, events: list[Event]) -> list[int]:
    answers = final_answers(events)
    return [int(net.seg_way[answers[t][0]]) for t in sorted(answers)]


def test_class_cost_commits_the_street_the_lean_runs_beside() -> None:
    """Off, the fixes beside the service road are answered on it (the lean picks it); on,
    every final answer and the committed path lie on the residential street, each answer
    within eps of its fix (distances by shapely)."""
    net = _street_and_service()
    pts = _pts()
    off = _ways(net, track_points(net, MatchSettings(), pts))
    assert off[20:40] == [SERVICE] * 20  # the failure the rule mends (x = 200..390 m)
    on = track_points(net, ON, pts)
    assert _ways(net, on) == [STREET] * len(pts)
    assert {int(net.seg_way[s]) for s in committed_path(on)} == {STREET}
    # shapely (GEOS distance), outside the core: on the street, within eps of the fix
    street = shapely.LineString([(0.0, 0.0), (600.0, 0.0)])
    service = shapely.LineString([(115.0, APART_M), (485.0, APART_M)])
    answers = final_answers(on)
    for i, t in enumerate(sorted(answers)):
        _, _, x, y = answers[t]
        point = shapely.Point(x, y)
        assert street.distance(point) < 1e-9
        assert point.distance(shapely.Point(pts[i])) <= EPS_M
        if 150.0 <= pts[i][0] <= 450.0:  # the fix lies nearer the service road, 1 m
            assert service.distance(shapely.Point(pts[i])) == pytest.approx(APART_M - LEAN_M)


def test_class_cost_changes_nothing_where_the_lean_is_on_the_street_side() -> None:
    """Fixes leaning 2 m south (away from the service road) are answered on the street
    with the rule off and on alike: the charge only tips near-equal candidates."""
    net = _street_and_service()
    pts = [(x, -LEAN_M) for x, _ in _pts()]
    assert _ways(net, track_points(net, MatchSettings(), pts)) == [STREET] * len(pts)
    assert track_points(net, ON, pts) == track_points(net, MatchSettings(), pts)


def test_class_cost_leaves_a_network_of_minor_roads_alone() -> None:
    """Where every candidate is on a minor road (two service aisles 3 m apart), the charge
    is taken less the least and nothing changes: the same events on and off."""
    aisle = Road([(float(x), 0.0) for x in range(0, 601, 50)], way=STREET, highway="service")
    other = Road([(100.0, 0.0), (115.0, APART_M)]
                 + [(float(x), APART_M) for x in range(150, 451, 50)]
                 + [(485.0, APART_M), (500.0, 0.0)], way=SERVICE, highway="service")
    net = network_from_roads([aisle, other])
    assert minor_segments(net).tolist() == [1.0] * net.n_segments
    assert track_points(net, ON, _pts()) == track_points(net, MatchSettings(), _pts())


@pytest.mark.parametrize("restore_at", [15, 30, 45])
def test_class_cost_restored_mid_drive_goes_on_the_same(restore_at: int) -> None:
    """A tracker checkpointed and restored mid-drive gives the same events as one that never
    stopped (the setting is not state: the charges already paid are in the costs kept)."""
    net = _street_and_service()
    assert track_points(net, ON, _pts(), restore_at=restore_at) == \
        track_points(net, ON, _pts())


def test_class_cost_every_event_before_the_service_road_is_the_same() -> None:
    """Before the service road comes within the largest eps (60 m) the rule charges
    nothing: the events of the first fixes are identical on and off."""
    net = _street_and_service()
    before: list[list[Event]] = []
    for settings in (MatchSettings(), ON):
        tracker = Tracker(net, "v", settings)
        events: list[Event] = []
        for i, (x, y) in enumerate(_pts()[:4]):  # x <= 30 m: 70 m from the ramp at 100 m
            events += tracker.update(Fix("v", float(i), 0.0, 0.0, x, y))
        before.append(events)
    assert before[0] == before[1]


def test_class_cost_is_off_by_default_and_validated() -> None:
    """The key is 0 (off) by default and must be a finite number >= 0."""
    assert MatchSettings().class_cost_m == 0.0
    for bad in (-1.0, float("nan"), float("inf"), "3"):
        problems = MatchSettings(class_cost_m=bad).problems()  # type: ignore[arg-type]
        assert ("class_cost_m", f"must be a number >= 0, got {bad!r}") in problems
    assert MatchSettings(class_cost_m=3.0).problems() == []


def test_minor_segments_follow_the_osm_highway_order() -> None:
    """Classes after ``residential`` in the OSM wiki's Key:highway order (from memory) are
    minor: living_street, service, road and unlisted ones such as track; the street
    classes up to residential are not."""
    classes = ["primary", "tertiary", "unclassified", "residential", "living_street",
               "service", "road", "track"]
    net = network_from_roads([Road([(0.0, 10.0 * i), (100.0, 10.0 * i)], way=i + 1,
                                   oneway=True, highway=c) for i, c in enumerate(classes)])
    got = dict(zip([net.roads[int(r)]["highway"] for r in net.seg_road],
                   minor_segments(net).tolist(), strict=True))
    assert got == {"primary": 0.0, "tertiary": 0.0, "unclassified": 0.0, "residential": 0.0,
                   "living_street": 1.0, "service": 1.0, "road": 1.0, "track": 1.0}
    assert np.asarray(minor_segments(net)).dtype == np.float64
