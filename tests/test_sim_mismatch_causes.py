"""Route mismatch put on the gaps between fixes (livematch.sim.score.pieces_at_marks,
mismatch_by_gap) and bench/oracle.py's cause table.

The outside reference is the route mismatch fraction's published definition (Newson &
Krumm, "Hidden Markov Map Matching Through Noise and Sparseness", ACM SIGSPATIAL GIS
2009: (length added + length subtracted) / true length, here over directed segments
as multisets): the gaps' metres must add up to it, worked by hand on a small case and
by Python's own multiset arithmetic (collections.Counter) on random ones.
"""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest

from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive
from livematch.sim.score import mismatch_by_gap, pieces_at_marks, route_mismatch_fraction
from tests.catalogue import grid
from tests.test_sim_oracle import T0, bench_oracle


def test_pieces_put_together_are_the_path() -> None:
    """Split at any marks (found or not), the pieces concatenated are the path, in order,
    and each found mark's piece starts with its segment."""
    rng = np.random.default_rng(3)
    for _ in range(200):
        path = [int(s) for s in rng.integers(0, 6, size=int(rng.integers(0, 12)))]
        marks = [(k, int(s)) for k, s in enumerate(rng.integers(0, 8, size=5))]
        pieces = pieces_at_marks(path, marks)
        assert [s for _, piece in pieces for s in piece] == path
        for key, piece in pieces:
            if key >= 0:
                assert piece == [] or piece[0] == dict(marks)[key]


def test_hand_worked_gap_split() -> None:
    """Truth 0 -> 1 -> 2 -> 3 (10 m each) in two gaps; the match takes 4 (20 m) instead of
    2 in the second gap: added 20, missed 10, route mismatch (20 + 10) / 40 by the
    definition, all of it on the second gap."""
    lens = np.array([10.0, 10.0, 10.0, 10.0, 20.0])
    truth = {0: [0, 1], 1: [2, 3]}
    matched = {0: [0, 1], 1: [4, 3]}
    got = mismatch_by_gap(truth, matched)
    assert got[0] == (Counter(), Counter())
    assert got[1] == (Counter({4: 1}), Counter({2: 1}))
    rmf = route_mismatch_fraction([0, 1, 2, 3], [0, 1, 4, 3], lens)
    assert rmf == pytest.approx((20.0 + 10.0) / 40.0)


def test_gaps_add_up_to_the_measure() -> None:
    """On random paths cut into random gaps: the gaps' added and missed counts add up, per
    segment, to the whole paths' multiset differences (Counter subtraction), so their
    metres add up to route mismatch x true length; a segment matched one gap early is
    on no gap."""
    rng = np.random.default_rng(11)
    lens = rng.uniform(5.0, 80.0, size=9)
    for _ in range(300):
        n = int(rng.integers(1, 6))
        truth = {k: [int(s) for s in rng.integers(0, 9, size=int(rng.integers(0, 5)))]
                 for k in range(n)}
        matched = {k: [int(s) for s in rng.integers(0, 9, size=int(rng.integers(0, 5)))]
                   for k in range(n)}
        t_all = [s for k in range(n) for s in truth[k]]
        m_all = [s for k in range(n) for s in matched[k]]
        got = mismatch_by_gap(truth, matched)
        added = sum((a for a, _ in got.values()), Counter())
        missed = sum((m for _, m in got.values()), Counter())
        assert added == Counter(m_all) - Counter(t_all)
        assert missed == Counter(t_all) - Counter(m_all)
        if t_all:
            metres = sum(lens[s] * c for s, c in (added + missed).items())
            assert metres == pytest.approx(
                route_mismatch_fraction(t_all, m_all, lens) * sum(lens[s] for s in t_all))
    shifted = mismatch_by_gap({0: [1], 1: [2]}, {0: [1, 2], 1: []})
    assert all(not a and not m for a, m in shifted.values())


@pytest.mark.pure_python
def test_bench_causes_add_up_to_livematch_rmf() -> None:
    """bench/oracle.py --causes on grid walks at 15 s: the causes' metres over the true
    length equal livematch's pooled route mismatch (the bench's own, from
    bench/accuracy.py's score), and every commit has a kind."""
    mod = bench_oracle()
    net = grid(4, 50.0, 25.0)
    allowed = drivable_segments(net)
    drives = [simulate_drive(net, np.random.default_rng([8, i]), f"w{i}", T0,
                             DriveSettings(duration_s=300.0), allowed) for i in range(4)]
    row = mod.measure(net, [(d, observe(d, 15)) for d in drives], [0.0], livematch=True,
                      matcher={}, with_causes=True)
    c = row["causes"]
    total = sum(v["added_m"] + v["missed_m"] for v in c["by_cause"].values())
    assert total / (1000.0 * c["true_km"]) == pytest.approx(row["livematch_rmf"], abs=1e-9)
    assert c["commits"] > 0 and 0.0 <= c["fixes_as_oracle"] <= 1.0
