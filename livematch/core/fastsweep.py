"""A compiled drop-in for :func:`livematch.core.sweep.sweep_step`.

:func:`fast_sweep_step` takes and returns the same ``dict[int, Node]`` as the reference
and gives identical results: the same new states in the same dict order, every field
bit-identical (segment, position, matched point, cost, lowest reachable position,
``via``), each parent the very live :class:`~livematch.core.sweep.Node` object the
reference would pick. The work happens in :func:`livematch.core._sweep_kernel.sweep_kernel`
(numba); this module only packs the live states into one float array and builds the
``Node`` objects from the kernel's output rows. The pure-Python reference stays the
definition: ``tests/test_fastsweep.py`` compares the two step by step.

The network's arrays, and the kernel's scratch and output buffers, are built once per
network and kept on the :class:`~livematch.core.network.RoadNetwork` object (like its
:class:`~livematch.core.view.NetworkView`), shared by every vehicle on that network. The
scratch is reused from call to call, so calls on one network must not run concurrently
(the daemon runs every tracker on one event loop; the kernel itself holds the GIL).

Example (a vehicle moving 10 m along a straight road; no live states gives no states):
    >>> from livematch.core.build import Road, network_from_roads
    >>> from livematch.core.sweep import Node, StepContext, sweep_step
    >>> from livematch.core.view import view_of
    >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1, oneway=True)])
    >>> ctx = StepContext(view_of(net), 15.0, 20.0, 1.0, 30.0, 1.0, 2, 1.0, 10.0,
    ...                   0.02, 0.2, 5.0)
    >>> live = {0: Node(0, 1, 0.0, 0.2, 20.0, 0.0, None, (), 0.0, 0.05)}
    >>> new = fast_sweep_step(live, ctx)
    >>> [(n.seg, n.pos, n.parent is live[0]) for n in new.values()]
    [(0, 0.3, True)]
    >>> new[0].cost == sweep_step(live, ctx)[0].cost
    True
    >>> fast_sweep_step({}, ctx)
    {}
"""

from __future__ import annotations

import operator
from typing import Final

import numpy as np
import numpy.typing as npt

from livematch.core import _sweep_kernel as _k
from livematch.core.network import RoadNetwork, minor_segments
from livematch.core.sweep import Node, StepContext
from livematch.core.view import NetworkView

__all__ = ["SweepArrays", "fast_sweep_step", "sweep_arrays"]

_ATTR: Final = "_sweep_arrays"  # where the per-network arrays live on the RoadNetwork object
# The fields of a live state the kernel reads, in the order of a row of its ``live`` array.
_packed_fields = operator.attrgetter("seg", "low", "pos", "x", "y", "cost")

# Initial buffer capacities (heap entries, via slots, output rows, offers); doubled on
# overflow. A 1 Hz step on a city network makes a few dozen entries and offers.
_START_ENTRIES: Final = 1024
_START_VIA: Final = 4096
_START_ROWS: Final = 512
_START_OFFERS: Final = 2048


def _aligned_empty(n: int, align: int = 64) -> npt.NDArray[np.float64]:
    """``n`` float64 whose first one starts on an ``align``-byte boundary (a cache line)."""
    raw = np.empty(n + align // 8, dtype=np.float64)
    skip = (-raw.ctypes.data % align) // 8
    return raw[skip:skip + n]


def network_records(view: NetworkView) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.int64]]:
    """The kernels' network arrays ``(netf, neti)`` (layout in ``_sweep_kernel``).

    ``netf``: one record of ``SEG_STRIDE`` float64 per segment, ``ax, ay, bx, by, len,
    to, twin, slot`` (``slot`` -1: the kernel's scratch), then one of ``V_STRIDE`` per
    vertex, ``white_lo, white_hi, flag, adj`` (the first three the kernel's scratch,
    ``adj`` its out-segments and ``turn_back_ok``), starting on a cache line, so that a
    step touches one line per segment it reads instead of one per array (coordinates,
    ends, twin, length, adjacency and the per-vertex scratch used to sit in twelve
    separate arrays). ``neti``: ``vptr[V + 1] | out_seg[E]`` with ``vptr[v] = 2
    out_ptr[v] + turn_back_ok[v]`` (the router's adjacency). Every coordinate and length
    is copied, not computed, so the kernels read the very floats the reference reads.
    """
    net = view.network
    n_v, n_e = net.n_vertices, net.n_segments
    vx = np.asarray(view.vx, dtype=np.float64)
    vy = np.asarray(view.vy, dtype=np.float64)
    sf = np.asarray(view.sf, dtype=np.int64)
    st = np.asarray(view.st, dtype=np.int64)
    out_ptr = np.asarray(net.out_ptr, dtype=np.int64)
    count = np.diff(out_ptr)
    if n_e >= 1 << (52 - _k.ADJ_SHIFT) or (n_v and count.max() > _k.ADJ_COUNT):
        raise ValueError("network too large for the sweep kernel's vertex records")
    e0 = _k.SEG_STRIDE * n_e
    netf = _aligned_empty(e0 + _k.V_STRIDE * n_v)
    rec = netf[:e0].reshape(n_e, _k.SEG_STRIDE)
    rec[:, _k.S_AX] = vx[sf]
    rec[:, _k.S_AY] = vy[sf]
    rec[:, _k.S_BX] = vx[st]
    rec[:, _k.S_BY] = vy[st]
    rec[:, _k.S_LEN] = np.asarray(view.slen, dtype=np.float64)
    rec[:, _k.S_TO] = st
    rec[:, _k.S_TWIN] = np.asarray(view.twin, dtype=np.int64)
    rec[:, _k.S_SLOT] = -1.0
    ok = np.asarray(view.turn_back_ok, dtype=np.int64) != 0
    vert = netf[e0:].reshape(n_v, _k.V_STRIDE)
    vert[:, :_k.W_ADJ] = 0.0
    vert[:, _k.W_ADJ] = (out_ptr[:-1] << _k.ADJ_SHIFT) | (count << 1) | ok
    neti = np.empty(n_v + 1 + n_e, dtype=np.int64)
    neti[:n_v + 1] = 2 * out_ptr
    neti[:n_v] += ok
    neti[n_v + 1:] = net.out_seg
    return netf, neti


class SweepArrays:
    """The kernel's arrays for one network: read-only network data plus scratch buffers.

    Attributes:
        netf, neti: the network: a record per segment and the adjacency
            (:func:`network_records`, layout in ``_sweep_kernel``).
        seg_geo: per segment (a, b) the row ``ax, ay, bx - ax, by - ay`` (metres).
        seg_minor: per segment 1.0 where its road class is minor, else 0.0
            (:func:`livematch.core.network.minor_segments`; the tracker's class charge).
        fbuf, ibuf: scratch and output buffers, grown by :meth:`grow`.
        chain: scratch for the rows of a commit's chain (``CandidateTree.chain``).
        step: scratch for a tree step's scalars (``N_CTX`` of them; ``Tracker``).
        step_for: the settings whose weights ``step[6:9]`` hold (None: none yet), so a
            tracker writes them only when another's settings wrote them last.
        out_f0, out_i0: where the output rows start (the vias follow the int rows).
    """

    __slots__ = ("cap_b", "cap_h", "cap_m", "cap_o", "chain", "fbuf", "ibuf", "n_e", "n_v",
                 "netf", "neti", "out_f0", "out_i0", "seg_geo", "seg_minor", "step",
                 "step_for")

    def __init__(self, view: NetworkView) -> None:
        net = view.network
        self.n_v = net.n_vertices
        self.n_e = net.n_segments
        self.netf, self.neti = network_records(view)
        # per segment (a, b): ax, ay, bx - ax, by - ay, so that a matched point is
        # ax + pos * (bx - ax) with the very operations the sweep uses (tree rows keep no
        # point; livematch.core._tree_kernel.live_scores recomputes them from this)
        vx = np.asarray(view.vx, dtype=np.float64)
        vy = np.asarray(view.vy, dtype=np.float64)
        sf = np.asarray(view.sf, dtype=np.int64)
        st = np.asarray(view.st, dtype=np.int64)
        self.seg_geo: npt.NDArray[np.float64] = np.ascontiguousarray(np.stack(
            [vx[sf], vy[sf], vx[st] - vx[sf], vy[st] - vy[sf]], axis=1))
        self.seg_minor: npt.NDArray[np.float64] = minor_segments(net)
        # the rows of a commit's chain (CandidateTree.chain), grown when too short
        self.chain: npt.NDArray[np.int64] = np.empty(256, dtype=np.int64)
        self.step: npt.NDArray[np.float64] = np.zeros(_k.N_CTX)
        self.step_for: object = None
        self.fbuf: npt.NDArray[np.float64] = np.empty(0)
        self.ibuf: npt.NDArray[np.int64] = np.empty(0, dtype=np.int64)
        self.cap_h = self.cap_b = self.cap_m = self.cap_o = 0
        self.out_f0 = self.out_i0 = 0
        self.resize(_START_ENTRIES, _START_VIA, _START_ROWS, _START_OFFERS)

    def resize(self, cap_h: int, cap_b: int, cap_m: int, cap_o: int) -> None:
        """Fresh buffers: ``cap_h`` heap entries, ``cap_b`` vias, ``cap_m`` rows, ``cap_o`` offers.

        Also the way to test the growth path: start with tiny capacities.
        """
        n_v, n_e = self.n_v, self.n_e
        self.cap_h, self.cap_b, self.cap_m, self.cap_o = cap_h, cap_b, cap_m, cap_o
        _, _, out_f0, _, out_i0, end = _k.layout(n_v, n_e, cap_h, cap_b, cap_m, cap_o)
        self.out_f0, self.out_i0 = out_f0, out_i0
        # after the output rows, room for a tree step's packed live block (as many
        # states as output rows: the block is the step before's output, mostly)
        self.fbuf = np.zeros(out_f0 + cap_m * _k.OUT_F_STRIDE + _k.N_CTX
                             + cap_m * _k.LIVE_STRIDE)
        ibuf = np.zeros(end, dtype=np.int64)
        ibuf[: _k.N_HEADER] = (n_v, n_e, cap_h, cap_b, cap_m, cap_o)
        self.ibuf = ibuf

    def grow(self) -> None:
        """Double every growable capacity (after the kernel reported an overflow)."""
        self.resize(2 * self.cap_h, 2 * self.cap_b, 2 * self.cap_m, 2 * self.cap_o)


def sweep_arrays(view: NetworkView) -> SweepArrays:
    """The network's shared :class:`SweepArrays`, built on first use."""
    network: RoadNetwork = view.network
    arrays = getattr(network, _ATTR, None)
    if arrays is None:
        arrays = SweepArrays(view)
        setattr(network, _ATTR, arrays)
    return arrays


def fast_sweep_step(live: dict[int, Node], ctx: StepContext) -> dict[int, Node]:
    """:func:`livematch.core.sweep.sweep_step`, compiled: same arguments, same result.

    Advances the states ``live`` (at fix p0) by the trace segment p0 -> p1 and returns
    the states at p1, empty when the window is no longer within eps.
    """
    if not live:
        return {}
    arrays = sweep_arrays(ctx.view)
    nodes = list(live.values())
    flat = [ctx.eps, ctx.x0, ctx.y0, ctx.x1, ctx.y1, ctx.chord, ctx.inv_two_sigma2,
            ctx.inv_beta, ctx.turn_back_cost, ctx.motion_cost, ctx.roll_back]
    for seg, n in live.items():
        flat.append(seg)
        flat += _packed_fields(n)
    packed = np.array(flat, dtype=np.float64)
    m, n_via = _k.sweep_kernel(arrays.netf, arrays.neti, packed, arrays.fbuf, arrays.ibuf)
    while m < 0:
        arrays.grow()
        m, n_via = _k.sweep_kernel(arrays.netf, arrays.neti, packed, arrays.fbuf,
                                   arrays.ibuf)
    if m == 0:
        return {}
    f0 = arrays.out_f0
    i0 = arrays.out_i0
    n_ints = m * _k.OUT_I_STRIDE
    ri = arrays.ibuf[i0:i0 + n_ints + n_via].tolist()
    rf = iter(arrays.fbuf[f0:f0 + m * _k.OUT_F_STRIDE].tolist())
    vias = ri[n_ints:] if n_via else []
    seq = ctx.seq
    t = ctx.t
    new: dict[int, Node] = {}
    it = iter(ri)  # four ints, then five floats per row; zip stops when rf runs out
    for seg, parent, via_start, via_len, low, pos, x, y, cost in zip(
            it, it, it, it, rf, rf, rf, rf, rf, strict=False):
        via = tuple(vias[via_start:via_start + via_len]) if via_len else ()
        new[seg] = Node(seg, seq, t, pos, x, y, nodes[parent], via, cost, low)
    return new
