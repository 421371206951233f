"""``break_rejoin``: a commit that cannot be joined to the last committed point goes on
from its own tree's answer for that fix instead of breaking the committed path.

The outside check is shapely: the segments the commit adds, from the tree's answer for the
last committed fix to the commit's first fix, merge (``shapely.ops.linemerge``) into one
line that starts at the end of the tree's segment and ends at the end of the first fix's
segment (``shapely`` geometry, not the project's).
"""

from __future__ import annotations

import pytest
from shapely.geometry import LineString, MultiLineString
from shapely.ops import linemerge

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node
from livematch.core.tracker import Tracker

# a one-way street of three 100 m segments along y = 0, and one 100 m street 2 km away
# that no route reaches
ROADS = [Road([(0.0, 0.0), (100.0, 0.0), (200.0, 0.0), (300.0, 0.0)], way=1, oneway=True),
         Road([(0.0, 2000.0), (100.0, 2000.0)], way=2, oneway=True)]


def segment(net: RoadNetwork, way: int, x0: float) -> int:
    """The segment of ``way`` that starts at x = ``x0``."""
    for s in range(net.n_segments):
        if net.source_ids(s)[0] == way and float(net.node_xy[net.seg_from[s]][0]) == x0:
            return s
    raise AssertionError((way, x0))


def commit_after_lost_join(rejoin: bool) -> tuple[RoadNetwork, Commit]:
    """A tracker whose last commit is on the far street (fix 4) commits fix 5 from a tree
    that read fix 4 on the first segment of the one-way street and fix 5 on its third."""
    net = network_from_roads(ROADS)
    tracker = Tracker(net, "v1", MatchSettings(break_rejoin=rejoin))
    far, s0, s1, s2 = (segment(net, 2, 0.0), segment(net, 1, 0.0), segment(net, 1, 100.0),
                       segment(net, 1, 200.0))
    tracker.last_commit = (far, 0.5, 4, 4.0)
    tracker.next_commit = 5
    before = Node(s0, 4, 4.0, 0.5, 50.0, 0.0, None, (), 0.0, 0.0)
    first = Node(s2, 5, 14.0, 0.3, 230.0, 0.0, before, (s1,), 1.0, 0.0)
    events: list = []
    tracker._commit_chain(None, 0, events, prune=None, built=([first], before))  # type: ignore[arg-type]
    (commit,) = events
    assert isinstance(commit, Commit)
    return net, commit


@pytest.mark.pure_python
def test_rejoin_goes_on_from_the_trees_own_answer() -> None:
    """On: the path is the tree's route from its answer at fix 4 (s0) into fix 5 (s1, s2),
    one line from x = 100 to x = 300 by shapely; the fix's answer is the same either way."""
    net, on = commit_after_lost_join(True)
    _, off = commit_after_lost_join(False)
    s1, s2 = segment(net, 1, 100.0), segment(net, 1, 200.0)
    assert on.path == (s1, s2)
    assert off.path == (s2,)  # the break: the path starts afresh at the fix's segment
    assert on.fixes == off.fixes
    xy = net.node_xy
    merged = linemerge(MultiLineString([LineString([tuple(xy[net.seg_from[s]]),
                                                    tuple(xy[net.seg_to[s]])])
                                        for s in on.path]))
    assert isinstance(merged, LineString)
    assert merged.coords[0] == (100.0, 0.0) and merged.coords[-1] == (300.0, 0.0)


@pytest.mark.pure_python
def test_rejoin_needs_the_trees_answer_for_that_fix() -> None:
    """A tree with no answer for the last committed fix (its node before is older) breaks
    as before."""
    net = network_from_roads(ROADS)
    tracker = Tracker(net, "v1", MatchSettings(break_rejoin=True))
    far, s0, s2 = segment(net, 2, 0.0), segment(net, 1, 0.0), segment(net, 1, 200.0)
    tracker.last_commit = (far, 0.5, 4, 4.0)
    tracker.next_commit = 5
    before = Node(s0, 3, 3.0, 0.5, 50.0, 0.0, None, (), 0.0, 0.0)
    first = Node(s2, 5, 14.0, 0.3, 230.0, 0.0, before, (segment(net, 1, 100.0),), 1.0, 0.0)
    events: list = []
    tracker._commit_chain(None, 0, events, prune=None, built=([first], before))  # type: ignore[arg-type]
    assert events[0].path == (s2,)


def test_setting_is_validated() -> None:
    """A non-boolean value is reported."""
    assert ("break_rejoin", "must be true or false, got 1") in MatchSettings(
        break_rejoin=1).problems()  # type: ignore[arg-type]
    known = MatchSettings.keys()
    assert "break_rejoin" in known
