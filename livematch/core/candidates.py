"""One eps level's tree of candidate paths, held in one flat array.

The tree of back-pointers (:mod:`livematch.core.sweep`) changes on every fix: each live
state of the new fix is a new node. Kept as Python objects, building those nodes costs
more than the compiled sweep that computes them, and each costs a few hundred bytes.
:class:`CandidateTree` keeps the nodes as rows of one flat int32 array instead, the ints
first (with the tree's counts in a header, and the vias), then the floats, viewed as
float64 (layout in :mod:`livematch.core._tree_kernel`): the sweep kernel's output rows
are appended as they are, the newest fix's states are one block of rows, and every
operation the tracker needs on the tree (best leaf, deepest common ancestor, pruning,
trimming, the chain a commit settles) is a compiled function on that array. Rows no live
state descends from are dropped when the array fills up
(:func:`~livematch.core._tree_kernel.compact`).

Rare steps (bridging a gap, starting afresh) still run the pure-Python code of
:mod:`livematch.core.sweep` on :class:`~livematch.core.sweep.Node` objects:
:meth:`CandidateTree.live_nodes` hands the live rows out as nodes and
:meth:`CandidateTree.extend` takes the new nodes back as rows.

Example (a vehicle on a straight one-way road; two fixes 10 m apart):
    >>> import numpy as np
    >>> from livematch.core.build import Road, network_from_roads
    >>> from livematch.core.sweep import StepContext, fresh_start
    >>> from livematch.core.view import view_of
    >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1, oneway=True)])
    >>> ctx = StepContext(view_of(net), 15.0, 20.0, 1.0, 20.0, 1.0, 1, 1.0, 0.0,
    ...                   0.02, 0.2, 2.0)
    >>> tree = CandidateTree()
    >>> tree.extend(fresh_start(net, ctx), {})
    >>> step = np.array([15.0, 20.0, 1.0, 30.0, 1.0, 10.0, 0.02, 0.2, 2.0, 0.2, -1.0])
    >>> tree.sweep(view_of(net), step, 2, 2.0)
    True
    >>> [(n.seg, round(n.pos, 2), round(n.x, 2)) for n in tree.live_nodes(view_of(net))[0].values()]
    [(0, 0.3, 30.0)]
    >>> tree.sweep(view_of(net), np.array([15.0, 30.0, 1.0, 30.0, 90.0, 89.0, 0.02, 0.2,
    ...                                     2.0, 0.2, -1.0]), 3, 3.0)  # 89 m off the road: dies
    False
    >>> len(tree)  # a step that dies leaves the tree as it was
    1
"""

from __future__ import annotations

import math
import struct
from typing import Final

import numpy as np
import numpy.typing as npt

from livematch.core import _tree_kernel as _t
from livematch.core._chain_kernel import CHAIN_F, CHAIN_I, chain_rows
from livematch.core._direct import Direct
from livematch.core._sweep_kernel import window_best, window_step
from livematch.core._tree_kernel import (
    DIED,  # CandidateTree.step: the window died
    F_POS,
    H_CAP_L,
    H_CAP_ROWS,
    H_CAP_T,
    H_CAP_VIAS,
    H_HI,
    H_IEND,
    H_LCAP,
    H_LO,
    H_M,
    H_N,
    H_NF,
    H_NV,
    H_RCAP,
    H_T0,
    H_TCAP,
    HEAD,
    I_PARENT,
    I_SEG,
    I_VIAE,
    K_PARENT,
    K_SEG,
    LF_COST,
    LF_LOW,
    LIVE_F,
    MIN_SPARE,
    ROW_F,
    ROW_I,
    T_SPARE,
)
from livematch.core.fastsweep import SweepArrays, fast_sweep_step, sweep_arrays
from livematch.core.sweep import Node
from livematch.core.view import NetworkView

# the compiled calls a tracker's trees make on most fixes (a step that needs new arrays
# and its room, a commit's chain, the junction hold's distance), at their compiled code
# (livematch.core._direct): same types always
_CALLS: Final = Direct(compact_append=_t.compact_append, chain_into=_t.chain_into,
                       chain_rows=chain_rows, row_spare=_t.row_spare,
                       driven_since=_t.driven_since)

__all__ = ["DIED", "STATE_ROW_I", "CandidateTree"]

#: int32 values a row of a tree in a tracker state (``LMT6``): seg, seq, parent, via_end
STATE_ROW_I: Final = 4

_MIN_SPARE: Final = MIN_SPARE  # rows (and vias) of room left after a compaction, at least

_NO_BYTES: Final = memoryview(b"")
_F64: Final = struct.Struct("d")  # one float64 in the machine's order, as numpy's


def _tree_array(ints: int, floats: int) -> npt.NDArray[np.int32]:
    """A new tree array of ``ints`` int32 and ``floats`` float64 (from the next even index).

    Uninitialised but for ``H_IEND``, which says where the ints end.
    """
    out = np.empty(ints + (ints & 1) + 2 * floats, np.int32)
    out[H_IEND] = ints
    return out


def _empty_header() -> npt.NDArray[np.int32]:
    """The header alone: no rows, no vias, no floats (``H_IEND`` = ``HEAD``)."""
    ti = np.zeros(HEAD, np.int32)
    ti[H_IEND] = HEAD
    return ti


# the header alone (no rows, no vias), shared by every empty tree: nothing is written
# into it (rows are written only after a compaction has made an array of the tree's own)
_NO_TI: Final[npt.NDArray[np.int32]] = _empty_header()


def _state_ints(ti: npt.NDArray[np.int32], n: int) -> npt.NDArray[np.int32]:
    """The first ``n`` rows' ints as a tracker state keeps them: ``seg, seq, parent, via_end``.

    The tree keeps no fix in a row (each fix's first row instead, ``H_NF`` of them at the
    end of ``ti``); the state's rows (``LMT6``, ``STATE_ROW_I`` int32 a row) have it.
    """
    out = np.empty((n, STATE_ROW_I), np.int32)
    mine = ti[HEAD:HEAD + ROW_I * n].reshape(n, ROW_I)
    out[:, 0] = mine[:, I_SEG]
    out[:, 2] = mine[:, I_PARENT]
    out[:, 3] = mine[:, I_VIAE]
    nf = ti.item(H_NF)
    fb = ti.item(H_IEND) - ti.item(H_TCAP)
    t0 = ti.item(H_T0)
    firsts = np.minimum(ti[fb:fb + nf], n)
    out[:, 1] = np.repeat(np.arange(t0, t0 + nf, dtype=np.int32),
                          np.diff(firsts, append=n))
    return out


def _seq_in(ti: npt.NDArray[np.int32], row: int) -> int:
    """The fix of row ``row`` of the tree ``ti`` (:func:`~livematch.core._tree_kernel.seq_at`).

    Rows are in fix order and the tree keeps each fix's first row (the last ``H_TCAP``
    values of ``ti``): the row's fix is the last whose first row is <= it. Asked about
    rows of the last few fixes (a commit's, the live block's), so the search goes down
    from the newest fix, a few steps, before it hands a longer one to the compiled
    binary search.
    """
    fb = ti.item(H_IEND) - ti.item(H_TCAP)
    j = ti.item(H_NF) - 1
    for _ in range(4):
        if ti.item(fb + j) <= row:
            return ti.item(H_T0) + j
        j -= 1
    seq: int = _t.seq_at(ti, row)
    return seq


def _float_at(ti: npt.NDArray[np.int32], i: int) -> float:
    """Float ``i`` of the tree ``ti`` (``tf[i]``), read from its bytes: no view made.

    The floats start at the even index at or after ``H_IEND``: byte ``8 * ((H_IEND +
    1) // 2)``. (A view per read, ``ti.view(np.float64)``, cost about 2.6 µs more than
    ``tf.item`` in a throwaway timeit, this read about 0.3 µs; the live answer's point
    reads one float a fix: docs/measured.md "Session 30 (lay30)".)
    """
    # (numpy arrays are buffers; the stubs do not say so)
    value: float = _F64.unpack_from(ti, 8 * (((ti.item(H_IEND) + 1) >> 1) + i))[0]  # type: ignore[arg-type]
    return value


def _times_room(cap_t: int, cap: int, m: int, k: int) -> int:
    """Fix times the arrays a tree step compacts into hold: fewer than the kernel asks.

    The step (``tree_sweep``, ``ARENA_FULL``) asks for as much room for fix times as for
    rows: ``cap_t`` is the fix times kept and this step's, ``span_t``, plus ``max(span_t
    // 4, spare)``, ``spare = row_spare(m, k)`` the rows' least room (``m`` the
    new live block's rows, ``k`` the old one's); ``cap`` rows are the rows kept plus
    ``max(kept // 4, spare)``. A fix adds one fix time but ``m`` rows, so on a tree of
    several states the fix times would last several compactions: 8 bytes a slot never
    used, most of a KB per 1 Hz vehicle (``bench/memory.py``). The room kept here is the
    fixes the rows' room lasts at ``m`` rows a fix, and one more, at least ``T_SPARE``:
    ``spare`` slots fewer, that many more. The rows fill up first as before; what is
    kept and where is unchanged, and never fewer than ``span_t`` + that room (``cap_t -
    spare`` >= ``span_t``).
    """
    # row_spare's rule, here rather than a compiled call (one call fewer each time a
    # tree makes new arrays, about every second fix at 1 Hz)
    spare = max(m, k + k // 4 + _MIN_SPARE)
    rows_room = max(spare, cap // 5)  # about max(kept // 4, spare); only sizes the room
    room = (rows_room - m) // max(m, 1) + 1  # fixes until the rows fill, and one
    if room < T_SPARE:
        room = T_SPARE
    return cap_t - spare + room if room < spare else cap_t


class CandidateTree:
    """The candidate tree of one level: rows, vias, counts and floats in one flat array.

    Attributes:
        ti: the header (counts), the rows' ints, the vias and each fix's first row
            (int32; layout in :mod:`livematch.core._tree_kernel`), then, from the
            header's ``H_IEND`` on, the floats :attr:`tf`.
        lo, hi: the live block (the newest fix's states, in the reference's dict order):
            a copy of the header's, which the tracker reads many times a fix (a slot
            costs a tenth of an array read from Python); every call that moves the block
            hands the new bounds back.

    The counts live in the header of ``ti`` (:attr:`n`, :attr:`nv` and the live
    block), so a compiled call reads and updates them in place. One array, not an int
    and a float one: a numpy array costs about 120 bytes of its own beyond its data
    (three trees a vehicle), and a compiled call takes the tree as one argument and
    views its floats itself.
    """

    __slots__ = ("hi", "lo", "ti")

    def __init__(self) -> None:
        # the header alone, shared by every empty tree (nothing can be written into it:
        # rows are written only after a compaction has made an array of this tree's own)
        self.ti: npt.NDArray[np.int32] = _NO_TI
        self.lo = self.hi = 0

    @property
    def tf(self) -> npt.NDArray[np.float64]:
        """The floats: the rows' positions, the live rows' low and cost, the fix times.

        A float64 view of ``ti`` from ``H_IEND`` on, made per read (a per-fix path reads
        one float with :func:`_float_at` instead). An older row keeps no low and cost:
        nothing reads them once it is not live.
        """
        ti = self.ti
        e = ti.item(H_IEND)
        return ti[e + (e & 1):].view(np.float64)

    @property
    def n(self) -> int:
        """Rows in use."""
        return self.ti.item(H_N)

    @property
    def nv(self) -> int:
        """Vias in use."""
        return self.ti.item(H_NV)

    def __len__(self) -> int:
        """The number of live states."""
        return self.hi - self.lo

    def _synced(self) -> None:
        """Copy the live block's bounds from the header (after a compiled call moved it)."""
        ti = self.ti
        self.lo = ti.item(H_LO)
        self.hi = ti.item(H_HI)

    @property
    def cap_rows(self) -> int:
        """Rows the array has room for."""
        return self.ti.item(H_RCAP)

    @property
    def cap_vias(self) -> int:
        """Vias the array has room for."""
        return self.ti.item(H_IEND) - HEAD - ROW_I * self.cap_rows - self.ti.item(H_TCAP)

    @property
    def cap_live(self) -> int:
        """Live rows the array has room for the floats (low, cost) of."""
        return self.ti.item(H_LCAP)

    @property
    def cap_times(self) -> int:
        """Fix times the array has room for (from the first kept, ``H_T0``, on)."""
        ti = self.ti
        return (len(ti) >> 1) - ((ti.item(H_IEND) + 1) >> 1) - self._time_base()

    def _via_base(self) -> int:
        return HEAD + ROW_I * self.ti.item(H_RCAP)

    def _live_base(self) -> int:
        """Where the live block's floats start in ``tf``."""
        return ROW_F * self.ti.item(H_RCAP)

    def _time_base(self) -> int:
        """Where the fix times start in ``tf``."""
        ti = self.ti
        return ROW_F * ti.item(H_RCAP) + LIVE_F * ti.item(H_LCAP)

    def time_of(self, seq: int) -> float:
        """The time of fix ``seq`` (a fix of one of the tree's rows)."""
        return _float_at(self.ti, self._time_base() + seq - self.ti.item(H_T0))

    def _newest_seq(self) -> int:
        """The fix of the last row in use (the newest the tree has a time for), or -1."""
        ti = self.ti
        return ti.item(H_T0) + ti.item(H_NF) - 1 if ti.item(H_N) else -1

    # ----------------------------------------------------------------- growth
    def compact(self, spare_rows: int = 0, spare_vias: int = 0, spare_t: int = 0,
                spare_live: int = 0) -> None:
        """Drop the rows no live state descends from; leave room for more rows.

        The room left is at least ``spare_rows``, a live block and a quarter plus
        ``_MIN_SPARE`` (:func:`~livematch.core._tree_kernel.row_spare`), and a quarter of
        the rows kept (vias: ``spare_vias``, one per row of room and half the vias kept):
        a step or two before the next compaction, as a tree step that finds its arrays
        full leaves. Tight on purpose:
        a service holds many idle trees, and a compaction costs about a microsecond.
        Fix times: as many as rows, and room for ``spare_t`` after the newest kept.
        Live floats: for ``spare_live`` live rows at least.

        The new arrays come from compiled code (one call; two calls and numpy's arrays,
        as :meth:`shrink` does, cost about 2 µs more a compaction, and a 1 Hz vehicle
        compacts often), so each carries numba's memory-info object (about 130 bytes).
        """
        rows: int = _CALLS.row_spare(spare_rows, len(self))
        vias = max(spare_vias, rows)
        self.ti = _t.compact(self.ti, rows, vias, spare_t, spare_live)
        self._synced()

    def _compacted(self, cap_rows: int, cap_vias: int, cap_t: int) -> None:
        """Compact into new numpy arrays of ``cap_rows`` rows, ``cap_vias`` vias, ``cap_t`` times.

        Live floats for the live block's rows exactly.

        Numpy allocates them and a compiled call fills them
        (:func:`~livematch.core._tree_kernel.compact_into`): arrays allocated by compiled
        code and handed back cost about 130 bytes more each to keep, and an idle tree
        is kept for long.
        """
        live = self.hi - self.lo
        ti = _tree_array(HEAD + ROW_I * cap_rows + cap_vias + cap_t,
                         ROW_F * cap_rows + LIVE_F * live + cap_t)
        _t.compact_into(self.ti, ti, cap_rows, live)
        self.ti = ti
        self._synced()

    def shrink(self) -> None:
        """Keep only the rows still needed, with no room to spare (an idle tree)."""
        if self.ti.item(H_N) == 0:
            return
        self._compacted(*_t.kept_rows(self.ti))  # rows, vias, fix times

    def _make_room(self, rows: int, vias: int, first: int, last: int, live: int) -> None:
        """Room for ``rows`` rows and ``vias`` vias more, of fixes ``first`` to ``last``.

        ``live``: the new live block's rows (their floats).
        """
        newest = self._newest_seq()
        if newest < 0:
            newest = first - 1  # no row yet: the times will start at fix ``first``
            t_end = last - first + 1
        else:
            t_end = last - self.ti.item(H_T0) + 1
        if (self.n + rows > self.cap_rows or self.nv + vias > self.cap_vias
                or t_end > self.cap_times or live > self.cap_live):
            self.compact(rows, vias, max(0, last - newest), live)

    # ------------------------------------------------------------------ steps
    def sweep(self, view: NetworkView, ctx: npt.NDArray[np.float64], seq: int,
              t: float) -> bool:
        """One compiled sweep step (``ctx``: the kernel's step scalars) at fix ``seq``.

        Returns whether the window survived; if not, the tree is unchanged.
        """
        return self.step(sweep_arrays(view), ctx, seq, t) != DIED

    def step(self, arrays: SweepArrays, ctx: npt.NDArray[np.float64], seq: int, t: float,
             next_commit: int = 0, newest: int = -1) -> int:
        """:meth:`sweep` and, with ``newest`` >= 0, :meth:`commit_point` in one compiled call.

        ``arrays``: the network's :func:`~livematch.core.fastsweep.sweep_arrays`. Returns
        ``DIED`` (-2) when the window died (the tree is unchanged), else the commit point
        of the new live block for ``next_commit`` and ``newest`` (-1: none, or not asked).
        """
        # a tree whose arrays are full is compacted within them by the kernel
        top, lo, hi = _t.tree_sweep(arrays.netf, arrays.neti, arrays.fbuf, arrays.ibuf,
                                    ctx, self.ti, seq, t, next_commit, newest)
        if top >= DIED:  # a commit point (>= -1), or the window died
            self.lo = lo
            self.hi = hi
            return top
        return self.step_rest(arrays, ctx, seq, t, next_commit, newest, top)

    def step_rest(self, arrays: SweepArrays, ctx: npt.NDArray[np.float64], seq: int, t: float,
                  next_commit: int, newest: int, top: int) -> int:
        """The rest of :meth:`step` after its compiled call answered ``top`` < ``DIED``.

        ``ARENA_FULL`` (new arrays, then append) or ``TREE_OVERFLOW`` (grow the kernel's
        buffers, step again). A caller that makes the compiled call itself (the tracker,
        three levels a fix: a Python call fewer each) hands the answer on here.
        """
        while True:
            ti = self.ti
            if top == _t.ARENA_FULL:
                # the result waits in the kernel's buffers: compact into new arrays with
                # the room the kernel worked out (as compact() would size them) and
                # append, in one call
                cap = ti.item(H_CAP_ROWS)
                cap_t = _times_room(ti.item(H_CAP_T), cap, ti.item(H_M), self.hi - self.lo)
                ints = HEAD + ROW_I * cap + ti.item(H_CAP_VIAS) + cap_t
                ti2 = np.empty(ints + (ints & 1) + 2 * (ROW_F * cap + LIVE_F * ti.item(H_CAP_L)
                                                        + cap_t), np.int32)
                top = _CALLS.compact_append(ti, ti2, ints, arrays.fbuf, arrays.ibuf, seq,
                                            t, next_commit, newest)
                self.ti = ti2
                self._synced()
                return top
            arrays.grow()  # TREE_OVERFLOW: the kernel's buffers were too small
            top, lo, hi = _t.tree_sweep(arrays.netf, arrays.neti, arrays.fbuf, arrays.ibuf,
                                        ctx, ti, seq, t, next_commit, newest)
            if top >= DIED:
                self.lo = lo
                self.hi = hi
                return top

    def live_nodes(self, view: NetworkView) -> tuple[dict[int, Node], dict[int, int]]:
        """The live states as nodes (segment -> node), and node id -> row.

        Each node's parent is given too (as a parentless node), so the step that reached
        a state is known (its route length and speed), not the path before it. ``view``:
        the network, for the matched points (:meth:`node`).

        Every node is :meth:`node`'s of its row, field for field (the same float64s:
        the matched point is the same expression on the same numbers). The live block's
        rows, positions, floats and vias are read with one slice each rather than row by
        row: at 15-30 s between fixes every step of every level is bridged, and this ran
        once per level and fix for tens of live states (``bench/sparseprofile.py``).
        """
        nodes: dict[int, Node] = {}
        rows: dict[int, int] = {}
        ti = self.ti
        lo, hi = self.lo, self.hi
        if hi <= lo:
            return nodes, rows
        cap = ti.item(H_RCAP)
        tb = self._time_base() - ti.item(H_T0)
        if lo != ti.item(H_LO) or hi != ti.item(H_HI):  # not the header's live block
            return self._live_nodes_by_row(view, cap, tb)
        tf = self.tf
        k = hi - lo
        ints = ti[HEAD + ROW_I * lo:HEAD + ROW_I * hi].tolist()
        poss = tf[ROW_F * lo + F_POS:ROW_F * hi:ROW_F].tolist()
        lb = ROW_F * cap
        lives = tf[lb:lb + LIVE_F * k].tolist()
        t0 = self.seq_of(lo)
        t1 = self.seq_of(hi - 1)
        # each row's fix (one fix for the whole block, unless the block was made so)
        seqs = [t0] * k if t0 == t1 else [self.seq_of(r) for r in range(lo, hi)]
        times = tf[tb + t0:tb + t1 + 1].tolist()  # the fix times, by seq - t0
        # the vias of the whole block: a row's run from where the row before's end
        ends = ints[I_VIAE::ROW_I]
        before = ti.item(HEAD + ROW_I * (lo - 1) + I_VIAE) if lo else 0
        base = min(before, *ends)
        top = max(before, *ends)
        vb = HEAD + ROW_I * cap
        flat = ti[vb + base:vb + top].tolist() if top > base else []
        parents: dict[int, Node] = {}
        make = self._node
        sf, st, vx, vy = view.sf, view.st, view.vx, view.vy
        v0 = before
        for i in range(k):
            j = ROW_I * i
            seg = ints[j + I_SEG]
            seq = seqs[i]
            p = ints[j + I_PARENT]
            v1 = ints[j + I_VIAE]
            parent = None
            if p >= 0:
                parent = parents.get(p)
                if parent is None:
                    parent = parents[p] = make(view, p, None, ti, tf, cap, tb)
            # as _node: no vias when the row's end is 0 (or not past the row before's)
            via = tuple(flat[v0 - base:v1 - base]) if v1 and v1 > v0 else ()
            v0 = v1
            pos = poss[i]
            a = sf[seg]
            b = st[seg]
            ax = vx[a]
            ay = vy[a]
            node = Node(seg, seq, times[seq - t0], pos, ax + pos * (vx[b] - ax),
                        ay + pos * (vy[b] - ay), parent, via, lives[LIVE_F * i + LF_COST],
                        lives[LIVE_F * i + LF_LOW])
            nodes[seg] = node
            rows[id(node)] = lo + i
        return nodes, rows

    def _live_nodes_by_row(self, view: NetworkView, cap: int,
                           tb: int) -> tuple[dict[int, Node], dict[int, int]]:
        """:meth:`live_nodes`, one :meth:`node` per row (the definition)."""
        nodes: dict[int, Node] = {}
        rows: dict[int, int] = {}
        parents: dict[int, Node] = {}
        ti = self.ti
        tf = self.tf
        make = self._node
        for r in range(self.lo, self.hi):
            p = ti.item(ROW_I * r + K_PARENT)
            parent = None
            if p >= 0:
                parent = parents.get(p)
                if parent is None:
                    parent = parents[p] = make(view, p, None, ti, tf, cap, tb)
            node = make(view, r, parent, ti, tf, cap, tb)
            nodes[node.seg] = node
            rows[id(node)] = r
        return nodes, rows

    def extend(self, new: dict[int, Node], rows: dict[int, int]) -> None:
        """Append ``new`` (the next fix's states) as the live block.

        Each parent must be None (a root) or a node of :meth:`live_nodes`, found in
        ``rows``; the other fields are copied as they are.
        """
        vias = sum(len(n.via) for n in new.values())
        old_lo = self.lo
        k = len(new)
        if k:
            seqs = [n.seq for n in new.values()]
            first, last = min(seqs), max(seqs)
            self._make_room(k, vias, first, last, k)
        else:
            self._make_room(0, 0, 0, -1, 0)
        shift = self.lo - old_lo  # a compaction moves the live block, keeping its order
        lo = self.n
        ti = self.ti
        if k:
            # the fix times, one per fix (a gap in the run of fixes, if any, NaN)
            tf = self.tf
            tb = self._time_base()
            if lo == 0:
                ti[H_T0] = first
                have = 0
            else:
                have = ti.item(H_NF)
            t0 = ti.item(H_T0)
            if first < t0 + have - 1 if have else first < t0:
                raise ValueError(f"fix {first} is older than the tree's newest fix "
                                 f"{t0 + have - 1}: rows are kept in fix order")
            if last - t0 + 1 > have:
                tf[tb + have:tb + last - t0 + 1] = np.nan
            # each fix's first row (a fix with no rows: where the next one's start); the
            # new rows in fix order
            fb = ti.item(H_IEND) - ti.item(H_TCAP)
            nf = have
            at = lo
            for node in new.values():
                tf[tb + node.seq - t0] = node.t
                j = node.seq - t0
                if j >= nf:
                    ti[fb + nf:fb + j + 1] = at
                    nf = j + 1
                elif j < nf - 1:
                    raise ValueError("a fix's states must come in fix order")
                at += 1
            ti[H_NF] = nf
            # the rows gathered first and written with one assignment per array (a
            # bridged step brings tens to hundreds of states; a numpy write each costs)
            ints: list[int] = []
            floats: list[float] = []  # the rows' positions
            live: list[float] = []  # the live block's low and cost
            flat: list[int] = []  # the vias, one after another
            nv0 = nv = self.nv
            for node in new.values():
                via = node.via
                parent = -1 if node.parent is None else rows[id(node.parent)] + shift
                if via:
                    flat.extend(via)
                    nv += len(via)
                ints += (node.seg, parent, nv)
                # the matched point is not kept: it is node.x, node.y recomputed (see node);
                # the time is the fix's (above); low and cost while the row is live
                floats.append(node.pos)
                live += (node.low, node.cost)
            ti[HEAD + ROW_I * lo:HEAD + ROW_I * (lo + k)] = ints
            tf[ROW_F * lo:ROW_F * (lo + k)] = floats
            lb = self._live_base()
            tf[lb:lb + LIVE_F * k] = live
            if flat:
                vb = self._via_base()
                ti[vb + nv0:vb + nv] = flat
            ti[H_NV] = nv
        if ti is not _NO_TI:
            ti[H_LO] = lo
            ti[H_HI] = ti[H_N] = lo + k
        self.lo = lo
        self.hi = lo + k

    @classmethod
    def from_nodes(cls, live: dict[int, Node]) -> CandidateTree:
        """A tree holding the live states ``live`` (linked nodes) and their ancestors."""
        seen: dict[int, Node] = {}
        for leaf in live.values():
            cur = leaf.parent
            while cur is not None and id(cur) not in seen:
                seen[id(cur)] = cur
                cur = cur.parent
        older = sorted(seen.values(), key=lambda n: n.seq)  # parents before children
        tree = cls()
        row_of: dict[int, int] = {}
        # room for every row at once: a compaction in between would drop older rows
        every = (*older, *live.values())
        if every:
            tree._make_room(len(every), sum(len(n.via) for n in every),
                            min(n.seq for n in every), max(n.seq for n in every),
                            max(len(live), 1))
        for node in older:
            tree.extend({node.seg: node}, row_of)
            row_of[id(node)] = tree.lo
        tree.extend(live, row_of)
        return tree

    # ------------------------------------------------------------- questions
    def node(self, view: NetworkView, row: int, parent: Node | None = None) -> Node:
        """Row ``row`` as a :class:`Node` (with ``parent`` as its parent).

        The matched point is recomputed on ``view``'s geometry (:meth:`point`).
        """
        ti = self.ti
        cap = ti.item(H_RCAP)
        return self._node(view, row, parent, ti, self.tf, cap,
                          self._time_base() - ti.item(H_T0))

    @staticmethod
    def _node(view: NetworkView, row: int, parent: Node | None, ti: npt.NDArray[np.int32],
              tf: npt.NDArray[np.float64], cap: int, tb: int) -> Node:
        """:meth:`node` with the arrays, their row room and ``tb`` (fix seq's time at ``tb + seq``).

        (A chain of nodes is built per commit: the header is read once for all of them.)
        A row that is not live keeps no ``low`` and ``cost`` (nothing reads an older
        state's): its node has NaN for both.
        """
        i = HEAD + ROW_I * row
        seg, _, v1 = ti[i:i + ROW_I].tolist()
        seq = _seq_in(ti, row)
        pos = tf.item(ROW_F * row + F_POS)
        lo = ti.item(H_LO)
        if lo <= row < ti.item(H_HI):
            lf = ROW_F * cap + LIVE_F * (row - lo)
            low = tf.item(lf + LF_LOW)
            cost = tf.item(lf + LF_COST)
        else:
            low = cost = math.nan
        # the row's vias run from where the row before's end (most rows have none)
        v0 = ti.item(i - ROW_I + I_VIAE) if v1 and row else 0
        if v1 > v0:
            vb = HEAD + ROW_I * cap
            via = tuple(ti[vb + v0:vb + v1].tolist())
        else:
            via = ()
        a = view.sf[seg]
        b = view.st[seg]
        ax = view.vx[a]
        ay = view.vy[a]
        # the matched point, as in point() (inlined: a chain of nodes is built per commit)
        return Node(seg, seq, tf.item(tb + seq), pos, ax + pos * (view.vx[b] - ax),
                    ay + pos * (view.vy[b] - ay), parent, via, cost, low)

    def point(self, view: NetworkView, row: int) -> tuple[int, float, float, float]:
        """Row ``row``'s segment, position and matched point ``(seg, pos, x, y)``.

        Rows keep no matched point: it is ``a + pos (b - a)`` on the segment (a, b), the
        expression the sweep wrote it with (:func:`livematch.core.sweep._offer`, the
        sweep kernel), evaluated in the same order, so the same float64 comes out.
        """
        seg: int = self.ti.item(ROW_I * row + K_SEG)
        pos = _float_at(self.ti, ROW_F * row + F_POS)
        a = view.sf[seg]
        b = view.st[seg]
        ax = view.vx[a]
        ay = view.vy[a]
        return seg, pos, ax + pos * (view.vx[b] - ax), ay + pos * (view.vy[b] - ay)

    def seg_of(self, row: int) -> int:
        """The segment of row ``row``."""
        return self.ti.item(ROW_I * row + K_SEG)

    def seq_of(self, row: int) -> int:
        """The fix sequence number of row ``row``."""
        return _seq_in(self.ti, row)

    def row_ints(self, row: int) -> tuple[int, int, int, int, int]:
        """Row ``row``'s ``seg, seq, parent, via_start, via_len``."""
        i = HEAD + ROW_I * row
        seg, parent, v1 = self.ti[i:i + ROW_I].tolist()
        v0 = self.ti.item(i - ROW_I + I_VIAE) if row else 0
        return seg, _seq_in(self.ti, row), parent, v0, v1 - v0

    def via(self, j: int) -> int:
        """The ``j``-th via of the tree (a row's are ``via_len`` from its ``via_start``)."""
        return self.ti.item(self._via_base() + j)

    def live_along(self, slen: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
        """The live states' distances from their segments' starts (metres), in row order.

        ``slen``: every segment's length (metres).
        """
        lo, hi = self.lo, self.hi
        segs = self.ti[HEAD + ROW_I * lo + I_SEG:HEAD + ROW_I * hi:ROW_I]
        pos = self.tf[ROW_F * lo + F_POS:ROW_F * hi:ROW_F]
        out: npt.NDArray[np.float64] = pos * slen[segs]
        return out

    def live_before(self, which: npt.NDArray[np.int64] | None = None) -> npt.NDArray[np.int64]:
        """Per live state (row order), the segment its route drove just before its own.

        ``which``: only these live states (indices into the live block), in that order.

        The last via of the step that reached the row, else (a step that stayed on its
        segment) the same asked of its parent, up the tree; -1 where the tree keeps no
        such segment (a root, or ancestors trimmed away). As
        :func:`livematch.core.heading.node_before` on nodes.
        """
        ti = self.ti
        lo = self.lo
        idx = range(self.hi - lo) if which is None else which.tolist()
        vb = self._via_base()
        out = np.full(len(idx), -1, np.int64)
        for j, k in enumerate(idx):
            r = lo + k
            own = ti.item(HEAD + ROW_I * r + I_SEG)
            while True:  # a plain loop: a few rows, each a few steps up (numpy per row costs more)
                end = ti.item(HEAD + ROW_I * r + I_VIAE)
                if end > (ti.item(HEAD + ROW_I * (r - 1) + I_VIAE) if r > 0 else 0):
                    out[j] = ti.item(vb + end - 1)
                    break
                r = ti.item(HEAD + ROW_I * r + I_PARENT)
                if r < 0:
                    break
                seg = ti.item(HEAD + ROW_I * r + I_SEG)
                if seg != own:
                    out[j] = seg
                    break
        return out

    def costs(self) -> npt.NDArray[np.float64]:
        """The live states' path costs, in row order (a view)."""
        lb = self._live_base()
        return self.tf[lb + LF_COST:lb + LIVE_F * (self.hi - self.lo):LIVE_F]

    def best_cost(self) -> float:
        """The lowest path cost among the live states (the tree must not be empty)."""
        return float(self.costs().min())

    def best(self, prefer: int, score: npt.NDArray[np.float64] | None = None) -> int:
        """The row of the best live state (:func:`livematch.core.sweep.best_leaf`).

        With ``score`` (one value per live row, in row order, e.g. :meth:`live_scores`)
        the lowest score wins instead of the lowest path cost; ties are broken alike.
        """
        if score is None:
            return _t.best_row(self.ti, prefer)
        return _t.best_scored(self.ti, score, prefer)

    def live_scores(self, view: NetworkView, fix_xy: npt.NDArray[np.float64], fix_seq0: int,
                    first: int, inv_two_sigma2: float, tau_s: float,
                    max_dt: float) -> npt.NDArray[np.float64]:
        """:func:`livematch.core.sweep.live_score` of every live state, in row order.

        ``view``: the network (for the matched points). ``fix_xy[i]`` is the fix of
        sequence number ``fix_seq0 + i``; states older than fix ``first`` are not looked at.
        """
        return _t.live_scores(sweep_arrays(view).seg_geo, self.ti,
                              fix_xy, fix_seq0, first, inv_two_sigma2, 1.0 / tau_s, max_dt)

    def live_answer(self, view: NetworkView, prefer: int, fix_xy: npt.NDArray[np.float64],
                    fix_n: int, fix_seq0: int, first: int, inv_two_sigma2: float,
                    tau_s: float, max_dt: float, margin: float) -> tuple[int, int]:
        """:meth:`best` and :meth:`junction_split` in one compiled call: ``(best, split)``.

        Ranked by :meth:`live_scores` over ``fix_xy[:fix_n]`` when ``tau_s`` > 0, else by
        path cost; ``split`` is -1 when ``margin`` is not positive.
        """
        return _t.live_answer(sweep_arrays(view).seg_geo, self.ti,
                              prefer, fix_xy, fix_n, fix_seq0, first, inv_two_sigma2,
                              1.0 / tau_s if tau_s > 0.0 else 0.0, max_dt, margin)

    def common_ancestor(self, floor: int) -> int:
        """The live states' deepest common ancestor, -1 if none at or above fix ``floor``."""
        return _t.block_ancestor(self.ti, floor)

    def commit_point(self, next_commit: int, newest: int, cut: bool = False) -> int:
        """The deepest common ancestor of the live states, taken back to fix ``newest``.

        -1 unless its fix lies in ``[next_commit, newest]``: :meth:`common_ancestor` above
        fix ``next_commit - 1``, then :meth:`ancestor_at` ``newest`` if it is newer, in one
        compiled call. ``cut``: first cut the live paths' links to states older than fix
        ``next_commit - 1`` (:meth:`trim`'s cut, without a forced prune; the answer is the
        same either way).
        """
        return _t.cut_and_check(self.ti, next_commit, newest, cut)

    def ancestor_at(self, row: int, seq: int) -> int:
        """The ancestor of ``row`` (itself included) with the largest seq <= ``seq``."""
        return _t.ancestor_at(self.ti, row, seq)

    def junction_split(self, best: int, margin: float,
                       score: npt.NDArray[np.float64] | None = None) -> int:
        """The row where the near-best candidates split at a junction, or -1.

        Near-best: within ``margin`` of ``best`` in path cost, or in ``score`` if given
        (one value per live row, in row order).
        """
        if score is None:  # (a strided view: contiguous for the compiled kernel)
            score = np.ascontiguousarray(self.costs())
        return _t.junction_split(self.ti, best, margin,
                                 score)

    def driven_since(self, row: int, anc: int, slen: npt.NDArray[np.float64]) -> float:
        """Metres driven on ``row``'s path since the end of ancestor ``anc``'s segment.

        ``slen``: every segment's length (metres). Negative while ``row`` is still on
        ``anc``'s segment.
        """
        return float(_CALLS.driven_since(self.ti, slen, row, anc))

    def chain(self, view: NetworkView, top: int,
              min_seq: int) -> tuple[list[Node], Node | None]:
        """The path to ``top`` from fix ``min_seq`` on as linked nodes, and the node before.

        The first node's parent is the node before (None at a root). ``view``: the
        network, for the matched points.
        """
        arrays = sweep_arrays(view)
        ti = self.ti
        # the rows and their fields in one compiled call (livematch.core._chain_kernel):
        # ints into the chain scratch, floats into the kernel's float buffer (free scratch
        # between steps: a step's output is appended before anyone asks for a chain)
        n = _CALLS.chain_rows(ti, arrays.seg_geo, top, min_seq, arrays.chain,
                              arrays.fbuf)
        if n < 0 and CHAIN_I * -n > len(arrays.chain):  # the int scratch is too short
            arrays.chain = np.empty(2 * CHAIN_I * -n, dtype=np.int64)
            n = _CALLS.chain_rows(ti, arrays.seg_geo, top, min_seq, arrays.chain,
                                  arrays.fbuf)
        if n >= 0:
            # (typed: compiled, the reads below are list reads, not generic ones)
            ints: list[int] = arrays.chain[:CHAIN_I * n + CHAIN_I].tolist()
            fl: list[float] = arrays.fbuf[:CHAIN_F * n + CHAIN_F].tolist()
            parent = None
            b = CHAIN_I * n
            if ints[b] >= 0:
                f = CHAIN_F * n
                v0 = ints[b + 3]
                v1 = ints[b + 4]
                parent = Node(ints[b + 1], ints[b + 2], fl[f], fl[f + 1], fl[f + 2],
                              fl[f + 3], None, tuple(ti[v0:v1].tolist()) if v1 > v0 else (),
                              fl[f + 4], fl[f + 5])
            before = parent
            chain: list[Node] = []
            for j in range(n):
                b = CHAIN_I * j
                f = CHAIN_F * j
                v0 = ints[b + 3]
                v1 = ints[b + 4]
                parent = Node(ints[b + 1], ints[b + 2], fl[f], fl[f + 1], fl[f + 2],
                              fl[f + 3], parent,
                              tuple(ti[v0:v1].tolist()) if v1 > v0 else (),
                              fl[f + 4], fl[f + 5])
                chain.append(parent)
            return chain, before
        # the float buffer is too short (before the first step, or a long chain): the
        # rows' walk, then each row read from Python
        length = _CALLS.chain_into(self.ti, top, min_seq, arrays.chain)
        if length < 0:  # the shared scratch is too short: grow it (rarely)
            arrays.chain = np.empty(2 * -length, dtype=np.int64)
            length = _t.chain_into(self.ti, top, min_seq, arrays.chain)
        rows = arrays.chain[:length + 1].tolist()
        tf = self.tf
        cap = ti.item(H_RCAP)
        tb = self._time_base() - ti.item(H_T0)
        node = self._node
        before = node(view, rows[-1], None, ti, tf, cap, tb) if rows[-1] >= 0 else None
        chain = []
        parent = before
        for r in rows[:-1]:
            parent = node(view, r, parent, ti, tf, cap, tb)
            chain.append(parent)
        return chain, before

    # ---------------------------------------------------------------- cutting
    def prune(self, row: int) -> None:
        """Keep only the live states descending from ``row``."""
        self.hi = _t.prune_live(self.ti, row)

    def beam(self, margin: float, most: int, prefer: int,
             guard: CandidateTree | None = None) -> None:
        """Keep only the live states near the best (:func:`livematch.core.sweep.beam`).

        With ``guard`` (a smaller level's tree), a state whose segment is one of its live
        states' segments stays too (``MatchSettings.beam_guard``).
        """
        if guard is None:
            self.hi = _t.beam_live(self.ti, margin, most, prefer, self.ti, False)
        else:
            self.hi = _t.beam_live(self.ti, margin, most, prefer, guard.ti, True)

    def trim(self, next_commit: int, seq: int, trim_seq: int, max_lag: int,
             prefer: int) -> tuple[int, int]:
        """Cut history older than any future commit needs (``Tracker._trim``).

        Returns the new trim point and the seq of the state a forced prune kept (-1).
        """
        trim_seq, forced, self.hi = _t.trim(self.ti, next_commit, seq, trim_seq,
                                            max_lag, prefer)
        return trim_seq, forced

    def packed(self) -> CandidateTree:
        """A copy holding the rows still needed, tight (the live block is last).

        New arrays, exactly as long as needed; this tree is not changed. An empty tree
        gives an empty tree (sharing the module's empty header).
        """
        out = CandidateTree()
        if self.ti.item(H_N):
            rows, vias, times = _t.kept_rows(self.ti)
            live = self.hi - self.lo
            out.ti = _tree_array(HEAD + ROW_I * rows + vias + times,
                                 ROW_F * rows + LIVE_F * live + times)
            _t.compact_into(self.ti, out.ti, rows, live)
            out._synced()
        return out

    def packed_parts(self) -> tuple[int, int, int, int, tuple[memoryview, ...]]:
        """The state of :meth:`packed` without the tree: rows, vias, live, first fix, :meth:`parts`.

        (A checkpoint writes every level's tree this way: no tree object is made.)
        """
        if not self.ti.item(H_N):
            return 0, 0, 0, 0, (_NO_BYTES,) * 5
        rows, vias, times = _t.kept_rows(self.ti)
        live = self.hi - self.lo
        ti = _tree_array(HEAD + ROW_I * rows + vias + times,
                         ROW_F * rows + LIVE_F * live + times)
        _t.compact_into(self.ti, ti, rows, live)
        e = ti.item(H_IEND)
        tf = ti[e + (e & 1):].view(np.float64)
        flat = ti.data
        end = HEAD + ROW_I * rows
        floats = tf.data
        lb = ROW_F * rows
        tb = lb + LIVE_F * live
        return (rows, vias, live, ti.item(H_T0),
                (_state_ints(ti, rows).data, floats[:lb], floats[lb:tb],
                 flat[end:end + vias], floats[tb:]))

    def parts(self) -> tuple[memoryview, memoryview, memoryview, memoryview, memoryview]:
        """The rows' ints, positions, the live floats, the vias and the fix times, as buffers.

        The bytes of a tight tree's (:meth:`packed`) five parts are what the tracker
        state (``LMT6``) writes: ``n`` rows of ``STATE_ROW_I`` int32 (``seg, seq,
        parent, via_end``: each row's fix written out, :func:`_state_ints`), ``n`` rows
        of ``ROW_F`` float64 (the position), ``LIVE_F`` float64 (low, cost) for each live
        row, ``nv`` int32 vias, one float64 time per fix from ``H_T0`` to the newest
        row's.
        """
        n = self.n
        vb = self._via_base()
        lb = self._live_base()
        tb = self._time_base()
        times = self._newest_seq() - self.ti.item(H_T0) + 1 if n else 0
        tf = self.tf
        return (_state_ints(self.ti, n).data, tf[:ROW_F * n].data,
                tf[lb:lb + LIVE_F * (self.hi - self.lo)].data,
                self.ti[vb:vb + self.nv].data, tf[tb:tb + times].data)

    @classmethod
    def unpacked(cls, ti: npt.NDArray[np.int32], pos: npt.NDArray[np.float64],
                 lf: npt.NDArray[np.float64], tv: npt.NDArray[np.int32], live: int,
                 times: npt.NDArray[np.float64], t0: int) -> CandidateTree:
        """The tree of ``rows`` rows: ints ``ti``, positions ``pos``, live floats ``lf``, ...

        ... vias ``tv``, fix times ``times``. ``ti`` as a state holds them: flat
        (``STATE_ROW_I`` values a row, ``seg, seq, parent, via_end``) or one row a
        line, the rows in fix order, ``pos`` one float a row, ``lf`` ``LIVE_F`` floats
        (low, cost) for each of the last ``live`` rows (the live block); ``times[j]``
        is the time of fix ``t0 + j`` (from the first row's fix to the last's). Copied
        into arrays of the tree's own (so read-only buffers will do), exactly as long as
        needed. An empty tree shares the module's empty header instead of holding arrays
        of its own.
        """
        tree = cls()
        rows = len(pos)
        if rows:
            nv = len(tv)
            nf = len(times)
            end = HEAD + ROW_I * rows
            iend = end + nv + nf
            fstart = iend + (iend & 1)
            buf = np.zeros(fstart + 2 * (ROW_F * rows + LIVE_F * live + nf), np.int32)
            buf[H_IEND] = iend  # the header's other slots 0
            state = ti.reshape(rows, STATE_ROW_I)
            mine = buf[HEAD:end].reshape(rows, ROW_I)
            mine[:, I_SEG] = state[:, 0]
            mine[:, I_PARENT] = state[:, 2]
            mine[:, I_VIAE] = state[:, 3]
            buf[end:end + nv] = tv
            # each fix's first row (a fix with no rows: where the next one's start)
            seqs = state[:, 1]
            if (rows > 1 and bool((seqs[1:] < seqs[:-1]).any())) or int(seqs[0]) != t0 \
                    or int(seqs[-1]) != t0 + nf - 1:
                raise ValueError("a tree's rows must be in fix order, from fix t0 to its "
                                 "last time's")
            buf[iend - nf:iend] = np.searchsorted(seqs, np.arange(t0, t0 + nf), "left")
            buf[H_N] = rows
            buf[H_NV] = nv
            buf[H_LO] = tree.lo = rows - live
            buf[H_HI] = tree.hi = rows
            buf[H_T0] = t0
            buf[H_RCAP] = rows
            buf[H_LCAP] = live
            buf[H_NF] = buf[H_TCAP] = nf
            tree.ti = buf
            tf = buf[fstart:].view(np.float64)
            lb = ROW_F * rows
            tf[:lb] = pos
            tf[lb:lb + LIVE_F * live] = lf
            tf[lb + LIVE_F * live:] = times
        return tree

    @classmethod
    def unpacked_rows(cls, ti: npt.NDArray[np.int32], tf: npt.NDArray[np.float64],
                      tv: npt.NDArray[np.int32], live: int, times: npt.NDArray[np.float64],
                      t0: int) -> CandidateTree:
        """:meth:`unpacked` from rows of three floats ``low, pos, cost`` (``LMT5`` states).

        ``tf`` flat or one row a line. The rows' positions are kept, and the live
        rows' low and cost (an older state's are read by nothing).
        """
        rows3 = tf.reshape(-1, 3)
        live_f = rows3[len(rows3) - live:, 0::2]  # low, cost
        return cls.unpacked(ti, rows3[:, 1], live_f.reshape(-1), tv, live, times, t0)

    @classmethod
    def unpacked_timed(cls, ti: npt.NDArray[np.int32], tf: npt.NDArray[np.float64],
                       tv: npt.NDArray[np.int32], live: int) -> CandidateTree:
        """:meth:`unpacked` from rows that each carry their fix's time (states before LMT5).

        ``tf``: one row a line, ``low, pos, cost, t``. Each fix's time is taken from its
        rows (every row of a fix holds the same float).
        """
        rows = len(tf)
        if not rows:
            return cls()
        seqs = (ti if ti.ndim == 2 else ti.reshape(rows, STATE_ROW_I))[:, 1]
        t0 = int(seqs.min())
        times = np.full(int(seqs.max()) - t0 + 1, np.nan)
        times[seqs - t0] = tf[:, 3]
        return cls.unpacked_rows(ti, tf[:, :3], tv, live, times, t0)

    def rows(self, view: NetworkView) -> list[Node]:
        """Every row still needed (after a compaction), as linked nodes in row order."""
        self.compact()
        nodes: list[Node] = []
        ti = self.ti
        for r in range(self.n):
            p = ti.item(ROW_I * r + K_PARENT)
            nodes.append(self.node(view, r, nodes[p] if p >= 0 else None))
        return nodes


def warm_up() -> None:
    """Compile every tree and sweep kernel now rather than on a vehicle's first fixes.

    numba compiles a kernel on its first call (a few seconds on a cold cache, well under
    a second from the on-disk cache); a service calls this before it connects, so that no
    broker keepalive, acknowledgement or lease renewal waits behind a compilation. Runs a
    short trace through a T junction, calls the kernels a tracker meets only rarely, the
    sweep kernel on its own and the route monitor's window step.

    Example:
        >>> warm_up()  # compiles (or loads) the kernels; nothing to return
    """
    from livematch.core._fix_kernel import all_within
    from livematch.core.build import Road, network_from_roads
    from livematch.core.fix import Fix
    from livematch.core.sweep import StepContext
    from livematch.core.tracker import Tracker
    from livematch.core.view import view_of

    net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0), (200.0, 0.0)], way=1),
                              Road([(100.0, 0.0), (100.0, 100.0)], way=2)])
    tracker = Tracker(net, "warm-up")
    for i in range(12):
        tracker.update(Fix("warm-up", float(i), 0.0, 0.0, 10.0 * i, 1.0))
    tracker = Tracker.from_bytes(net, None, tracker.to_bytes())
    tree = tracker.levels[-1].tree
    row = tree.ancestor_at(tree.best(-1), 0)
    # kernels a tracker calls from Python only at a junction hold, a forced lag commit or
    # a spike test (5-35 s between fixes): a service met them compiling mid-run
    score = tree.live_scores(view_of(net), tracker.fix_xy[:tracker.fix_n], tracker.fix_seq0,
                             0, 0.02, 30.0, 5.0)
    best = tree.best(-1, score)
    tree.junction_split(best, 1.0, score)
    tree.driven_since(best, row, net.seg_len)
    tree.common_ancestor(0)
    _t.seq_at(tree.ti, 0)  # a row's fix, when it lies more than a few fixes back
    tree.beam(1.0, 1, -1)  # (MatchSettings.beam_margin / beam_keep, when set)
    tree.beam(1.0, 1, -1, tree)  # (and beam_guard)
    tree.prune(row)
    tree.trim(0, tracker.seq, 0, 60, -1)  # a tracker's own trim is rare: the commit check cuts
    # the sweep kernel on its own (the route monitor's step) is a compilation of its own
    live, _ = tree.live_nodes(view_of(net))
    ctx = StepContext.between(view_of(net), tracker.settings, 15.0, 110.0, 1.0, 120.0, 1.0,
                              tracker.seq + 1, 99.0)
    fast_sweep_step(live, ctx)
    # the compaction and append after a full tree (nothing to append here), and the
    # route monitor's step
    arrays = sweep_arrays(view_of(net))
    ti = tree.ti.copy()
    ti[H_CAP_ROWS] = tree.cap_rows  # the sizes a full step leaves (these arrays' own)
    ti[H_CAP_T] = tree.cap_times
    ti[H_CAP_L] = tree.cap_live
    _t.compact_append(ti, ti.copy(), ti.item(H_IEND), arrays.fbuf, arrays.ibuf,
                      tree.seq_of(tree.lo), tree.time_of(tree.seq_of(tree.lo)), 0, -1)
    rows = np.array([(n.seg, n.low, n.pos, n.x, n.y, n.cost) for n in live.values()])
    _, rows, driven = window_step(
        arrays.netf, arrays.neti, arrays.fbuf, arrays.ibuf,
        np.array((15.0, 110.0, 1.0, 120.0, 1.0, 10.0, 0.02, 0.1, 0.0, 0.0, -1.0)), rows,
        np.zeros(len(rows)))
    window_best(rows, driven)
    # the held point's check (a stand hold; livematch.core._fix_kernel): the types the
    # tracker passes
    all_within(tracker.fix_xy, 0, tracker.fix_n, 0.0, 0.0, 1.0)
    tracker.flush()
