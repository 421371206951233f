"""``smallest_commits``: a salvaged commit stops before the fixes a smaller live level covers.

Plain data: one straight two-way road (vertices at x = -300, 100, 400 m only, so no
U-turn is allowed between them); the vehicle drives east at 2 m/s with fixes every 5 s
and turns round in the middle of the segment at x = 160 m. The 15 m level dies at the
turn and starts afresh on the way back, the 30 m level a few fixes later, and the 60 m
level's candidates stay on the eastbound direction: the state in which a 60 m commit
could settle fixes that a smaller level's younger tree covers (docs/measured.md
"Session 16 (fleet5)"). The expected rows are read from the ladder's rule in
``livematch.core.tracker``'s docstring (each fix settled by the smallest level whose
tree covers it), not from the code under test.
"""

from __future__ import annotations

from livematch.core.build import Road, network_from_roads
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker


def _tracker_after(n: int) -> Tracker:
    net = network_from_roads([Road([(-300.0, 0.0), (100.0, 0.0), (400.0, 0.0)], way=1)])
    pts = [(-200.0 + 10 * i, 0.0) for i in range(36)]
    pts += [(160.0 - 10 * i, 0.0) for i in range(1, 30)]
    tracker = Tracker(net, "v", MatchSettings(smallest_commits=True))
    for i, (x, y) in enumerate(pts[:n]):
        tracker.update(Fix("v", 5.0 * i, 0.0, 0.0, x, y))
    return tracker


def test_the_key_is_on_by_default() -> None:
    assert MatchSettings().smallest_commits is True  # on since session 16
    keys = MatchSettings.keys()
    assert "smallest_commits" in keys
    assert MatchSettings(smallest_commits=1).problems()  # type: ignore[arg-type]


def test_a_commit_of_the_60_m_tree_stops_before_the_30_m_tree_begins() -> None:
    tracker = _tracker_after(48)
    small, mid, big = tracker.levels
    first = tracker.next_commit
    # the state this test is about: 15 m covers the oldest pending fix, 30 m began later
    assert small.tree_seq <= first < mid.tree_seq
    assert len(mid.tree) and len(big.tree) and big.tree_seq <= first
    top = big.tree.best(tracker.last_seg)
    assert big.tree.seq_of(top) >= mid.tree_seq
    row = tracker._smallest_top(big.eps, big.tree, top)
    # the fix before the 30 m tree's first, on the way to top (an ancestor of it)
    assert big.tree.seq_of(row) == mid.tree_seq - 1
    assert row == big.tree.ancestor_at(top, mid.tree_seq - 1)
    chain, _ = big.tree.chain(tracker._view, row, first)
    assert [n.seq for n in chain] == list(range(first, mid.tree_seq))
    # the 30 m level's own commits yield to no one: the 15 m tree covers the oldest fix
    top30 = mid.tree.best(tracker.last_seg)
    assert tracker._smallest_top(mid.eps, mid.tree, top30) == top30


def test_nothing_is_left_to_commit_when_the_smaller_tree_begins_at_the_next_fix() -> None:
    tracker = _tracker_after(48)
    _, mid, big = tracker.levels
    top = big.tree.best(tracker.last_seg)
    tracker.next_commit = mid.tree_seq  # as if everything before it were committed
    # the smaller tree now covers the oldest pending fix itself: not a limit
    assert tracker._smallest_top(big.eps, big.tree, top) == top
    mid.tree_seq = tracker.next_commit + 1  # began one fix after the oldest pending fix
    assert big.tree.seq_of(tracker._smallest_top(big.eps, big.tree, top)) == \
        tracker.next_commit
