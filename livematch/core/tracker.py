"""The per-vehicle tracker: filters, the eps ladder, commits and serialisable state.

A :class:`Tracker` turns one vehicle's stream of :class:`~livematch.core.fix.Fix` into
events (:mod:`livematch.core.events`). It is pure: the fix times are its only clock.

How it decides
--------------
* **Filters** (before the sweep, each with a reason code): ``duplicate`` (same time as a
  fix already taken), ``out_of_order`` (older than the newest fix taken; with
  ``reorder_fixes`` > 0 a small hold-back buffer first puts late arrivals in order),
  ``low_accuracy`` (reported accuracy worse than ``max_accuracy_m``), ``impossible_jump``
  (implied speed from the previous accepted fix above ``max_speed_mps``, or above the
  speed of the last accepted step plus what ``ACCEL_MPS2`` and the GNSS error
  (``sigma_m``) allow; after three such fixes in a row the newest is believed, so one
  bad fix cannot lock a vehicle out).
* **Spike test** (``spike_cost``; fixes 5-35 s after the one before): one fix
  later, a fix is dropped and reported as filtered (``spike``) when the path matched
  without it fits the next fix much better than the path through it (see
  :meth:`Tracker._spike_test`). This catches the outliers that no speed bound can at
  sparse sampling: 300 m off in 15 s is a plausible move. The newest fix of a sparse
  vehicle is therefore committed one fix later than before; the tracker keeps a copy
  of its levels as they were before its newest fix (serialised with the state).
* **The eps ladder**: one sweep (:mod:`livematch.core.sweep`) per level. The smallest
  level alive decides, and every assignment carries its certificate: ``eps_m`` and the
  window (``window_fixes``, ``window_s``) of fixes that lie within Fréchet distance
  ``eps_m`` of the reported road path. A fix no level matches (no road within the
  largest eps) is filtered as ``no_road_nearby``, or as ``road_beyond_eps`` when a road
  lies within ``off_network_m`` (:meth:`Tracker._refused_reason`).
* **The live answer**: the deciding level's candidate with the lowest live score
  (:func:`livematch.core.sweep.live_score`: the path cost with its distance terms
  rescored for GNSS error that is correlated in time, ``error_tau_s``), unless candidates
  scoring nearly as well disagree about the branch just taken: then the junction where
  they split, while the fix is within eps of it and the best candidate at most
  ``junction_hold_m`` past it (:meth:`Tracker._hold_at_junction`). Commits where the
  candidates merge need no ranking; a forced commit (below) picks the best candidate by
  the live score too while fixes come less than ``SPARSE_S`` apart, else by path cost.
  Both rankings start from the path cost, which with ``class_cost_m`` also charges each
  state on a minor road class at every fix where a state of its level is on a more
  important one (:func:`_charge_class`: a prior for the street over a service road drawn
  beside it; off by default).
* **When a level's window dies** (or a step is a gap: longer than ``gap_s`` / ``gap_m``),
  the step is bridged by routing from the live states to the segments within eps of the
  new fix, bounded by ``bridge_speed_mps`` times the time step: the candidate tree goes
  on, the certificate window restarts at the new fix. Only when no route exists (the
  vehicle left the network, or jumped) does the level start afresh from the spatial
  index — a new tree. A mid-segment U-turn is therefore handled as a death of the small
  levels followed by a bridge onto the opposite direction (U-turns *inside* the sweep
  are allowed only at dead ends and intersections).
* **Commits**: where all live candidates of a level share a prefix (their deepest common
  ancestor), that prefix is final. Fixes are committed in order, each by the smallest
  level whose candidate tree covers it, unless its stretch could neither continue nor
  join the committed path while another covering level's tree is at least as old: then
  that level commits when its candidates agree (:meth:`Tracker._defers`). If the oldest
  uncommitted fix is older than ``max_lag_fixes`` or ``max_lag_s``, the best candidate
  (of the smallest covering level: lowest live score below
  ``SPARSE_S`` between fixes, else lowest path cost; see :mod:`livematch.core.sweep`) is
  committed up to half the lag and the candidates that
  disagree with it are dropped; so state stays bounded whatever the trip length.
  With ``stand_loops``, a loop out of a vertex and back into it that the fixes inside it
  do not show (a stand within eps of the vertex, :meth:`Tracker._close_stand_loops`) is
  committed as standing at the vertex.
  Consecutive committed stretches are joined by a shortest route no longer than the
  vehicle could drive in the time between them nor (``join_detour``) than twice the
  straight distance between them plus slack (:meth:`Tracker._join_limit`), else the
  committed path breaks there. A stretch
  (the trip's first, or one after a break) whose first fix matched the very end of a
  segment reports that fix at the start of the segment it enters next, the same point,
  and its path begins there: the path never claims a segment the vehicle drove none of.
* **The trees are arrays** (:mod:`livematch.core.candidates`): each level's candidate
  tree is rows of flat arrays, swept and queried by compiled functions, and cut at the
  last commit (nothing older is ever read), so a tree holds the live candidates and
  their paths back to the last commit. Bridging and fresh starts, which are rare, run
  the pure-Python steps of :mod:`livematch.core.sweep` on node objects.
"""

from __future__ import annotations

import bisect
import dataclasses
import heapq
import itertools
import json
import math
import struct
import zlib
from array import array
from collections.abc import Callable, Iterator
from typing import Final

import numpy as np
import numpy.typing as npt

from livematch.core._direct import Direct
from livematch.core._fix_kernel import all_within
from livematch.core._tree_kernel import (
    K_SEG,
    LIVE_F,
    ROW_F,
    ROW_I,
    cut_and_check,
    tree_sweep,
)
from livematch.core._tree_kernel import live_answer as tree_live_answer
from livematch.core.candidates import DIED, STATE_ROW_I, CandidateTree
from livematch.core.events import Assignment, Commit, Event, Filtered, HeldAssignment, MatchedFix
from livematch.core.fastsweep import SweepArrays, sweep_arrays
from livematch.core.fix import Fix
from livematch.core.heading import (
    HEADING_MIN_MPS,
    HEADING_REACH_SIGMAS,
    grid_heading,
    state_charges,
)
from livematch.core.isotonic import isotonic_fit
from livematch.core.network import RoadNetwork
from livematch.core.routing import connect, small_loop
from livematch.core.settings import MatchSettings
from livematch.core.startroots import best_root
from livematch.core.sweep import Node, SharedSearches, StepContext, advance
from livematch.core.view import NetworkView, view_of
from livematch.core.wayout import project_on, relink, way_out_of_stand
from livematch.errors import BadStateError

STATE_FORMAT: Final = b"LMT6"
STATE_FORMAT_V5: Final = b"LMT5"  # as LMT6 with low, pos, cost in every row; still read
# as LMT5 with the fix time, via start and length in every row; read
STATE_FORMAT_V4: Final = b"LMT4"
STATE_FORMAT_V3: Final = b"LMT3"  # as LMT4 without the flags byte, zlib-compressed; still read
STATE_FORMAT_V2: Final = b"LMT2"  # as LMT3 with the matched point in every row; still read
STATE_FORMAT_V1: Final = b"LMT1"  # JSON rows of linked nodes; still read
_READABLE: Final = (STATE_FORMAT, STATE_FORMAT_V5, STATE_FORMAT_V4, STATE_FORMAT_V3,
                   STATE_FORMAT_V2, STATE_FORMAT_V1)
# float64 columns of a tree row in LMT2 (low, pos, x, y, cost, t), in LMT3 and LMT4 (low,
# pos, cost, t), in LMT5 (low, pos, cost), and the ones LMT3 and LMT4 keep of LMT2's
_V2_ROW_F: Final = 6
_V4_ROW_F: Final = 4
_V5_ROW_F: Final = 3
# int32 columns of a tree row up to LMT4 (seg, seq, parent, via_start, via_len)
_V4_ROW_I: Final = 5
_V2_KEPT: Final = [0, 1, 4, 5]
# Tracker.said: the fields of the newest live answer after its vehicle (t, segment,
# offset_m, x, y, eps_m, window_fixes, window_s) packed into one bytes object (97 bytes;
# the Assignment itself, with its own floats and segment number, kept 0.33 KB a driven
# vehicle, bench/memory.py step 6; packing it costs about 0.1 µs a fix)
_SAID: Final = struct.Struct("<dqddddqd")
JUMP_TRUST_AFTER: Final = 3
# A road vehicle changes speed by at most about 3 m/s per second (ordinary braking and
# acceleration; common practice, from memory).
ACCEL_MPS2: Final = 3.0
# The fix log's least size (Tracker._log_fix); it leaves half that many rows free at
# least when it fills up.
FIX_LOG_ROOM: Final = 8
# From this many seconds between fixes on, the trees are kept tight between fixes.
SPARSE_S: Final = 5.0
# A step slower than this (m/s) means the vehicle stood at its end: at 15 s between
# fixes 5 m of GPS drift is 0.3 m/s, a vehicle creeping off from a stop covers more
# (chosen by judgement, not tuned). Read only with MatchSettings.stop_turns.
STOOD_MPS: Final = 1.0
# A vehicle whose accepted fixes of STAND_S seconds all lie within STAND_SIGMAS times
# sigma_m of the last of them stood still (Tracker._standing); with
# MatchSettings.stand_wait its candidates wait, until STAND_AFTER_S seconds after the
# stand, for the vehicle to move off before the fix-count lag forces a commit. 10 s: a
# stop at a junction or a dwell, not a slow step; 10 s after it the vehicle has driven
# off by more than the smallest eps. 2 sigma_m: within GNSS noise of each other (at
# 3 sqrt(2) sigma_m, the jump filter's bound, a random walk circling a small loop
# counted as standing and lost 0.4 points of final accuracy on 20 seeded drives; at
# 2 sigma_m none, with the same gain on routed trips). Chosen on seed 31's drives.
STAND_S: Final = 10.0
STAND_AFTER_S: Final = 10.0
STAND_SIGMAS: Final = 2.0
# With MatchSettings.stand_at_vertex, a run of fixes whose median step from one fix to
# the next is shorter than this (metres) holds still: the receiver repeats its position
# (a noise-free log, or a receiver's static hold), so the run shows no wandering error
# that the path could have followed onto the road beyond a vertex, and
# Tracker._stand_at_vertex leaves it where the sweep matched it. A GNSS error that
# wanders moves a fix by about sigma sqrt(2 dt / tau) per axis each step: 1.05 m at 1 s
# and 2.3 m at 5 s for the simulator's sigma 5 m and tau 45 s (livematch.sim.drive's
# Gauss-Markov error). 0.1 m: far below that, far above rounding (chosen by judgement,
# not tuned).
STILL_M: Final = 0.1
# MatchSettings.stand_turnback reads a turn back at a stand only where the fixes of the
# loop (the node before it on) come at most this many seconds apart (median gap). At 5 s
# between fixes a vehicle that stops at a corner of a ring round a narrow island (a
# 30 x 16 m block of service roads on the Helsinki extract) and drives on round it
# leaves one or two fixes on the far side, which lies within eps of the way back; the
# stand, the fit and the first metres of the drive-off read like a turn back, and the
# random walk lost final fixes and route length there (docs/measured.md, "Session 15
# (ringv)"). At 1 s the fixes along the far side show the ring. 2 s: chosen by
# judgement between the two intervals measured.
TURNBACK_GAP_S: Final = 2.0
# With MatchSettings.stand_hold, a vehicle whose fixes of the last STAND_HOLD_S seconds
# all lie within STAND_SIGMAS sigma_m of the newest one stands now (Tracker._stand_start),
# and keeps standing while those of the last STAND_KEEP_S seconds do. 3 s: 10 m in 3 s is
# under 3.3 m/s, a vehicle stopping or creeping; the live answer held from the third
# second of a stop on (chosen on seed 31's routed-trip drives at 1 s between fixes,
# Helsinki: 3 / 3 s gave live road+dir 0.951, 5 / 3 s 0.945, 10 / 3 s 0.943, 10 / 10 s
# 0.941, off 0.902; the random walk 0.964, 0.962 at 10 / 3 s, off 0.954).
STAND_HOLD_S: Final = 3.0
STAND_KEEP_S: Final = 3.0
# Entries of Tracker._held (usually one or two: the stand's anchor, the newest run's)
_HELD_MEMO: Final = 8
_NO_FIXES: Final = np.empty((0, 2))  # shared by trackers that have seen no fix (never written)
_NAN: Final = math.nan  # the time of a fix not there (Tracker._last, _stand)
# A fix this many seconds after the fix before, from SPIKE_MIN_S to SPIKE_MAX_S, is kept
# open to the spike test (MatchSettings.spike_cost). Closer fixes are left to the jump
# filter, whose bound is tight at short steps. It stopped at 20 s while at 30 s between
# fixes it lost more good fixes than it caught outliers (-0.2 to -0.8 points of final
# accuracy, seeds other than the bench's); since bridged steps search and charge routes
# by the candidate's own pace (MatchSettings.pace_m, pace_reach) it gains at 30 s:
# bench/accuracy.py at 30 s, seeds 31 and 77, 80 drives, both extracts, random walk and
# routed trips, with pace_reach: final accuracy +0.1 to +0.9 points, route mismatch -0.6
# to -1.8 points; alone, random walk seed 31 at 30 s: +0.2 / +0.5 points (Helsinki /
# test). 35 s keeps a 30 s feed with late fixes in the test.
SPIKE_MIN_S: Final = 5.0
# With MatchSettings.speed_pace_m, a bridged step's route is charged for falling short of
# this share of the slower end's reported speed times the step's time: a fifth of slack
# for the speed changing over the step and the answers' error along the road (as
# speed_laps' shortfall, LAP_SLACK; chosen by judgement, not tuned).
SPEED_FLOOR_SHARE: Final = 0.8
SPIKE_MAX_S: Final = 35.0
# The time spanned by the two steps around a tested fix at which its charge is
# MatchSettings.spike_cost (it scales in proportion).
SPIKE_SPAN_S: Final = 30.0
# With MatchSettings.reverse_turns, a gap step (more than gap_s between fixes) went back
# the way the step before it came when both steps are at least REVERSE_MIN_M long and
# turn by more than 135 degrees (cosine below REVERSE_COS). 20 m: four times sigma_m of
# the default settings, well above the change of a correlated GNSS error over 15-30 s
# (about 5 m per axis at a 45 s time constant); 135 degrees: a turn at a junction round
# a block is 90 degrees, a U-turn 180 (chosen by judgement, not tuned).
REVERSE_MIN_M: Final = 20.0
REVERSE_COS: Final = -0.7
# A reversal is not taken for a turn in the street when a dead end lies ahead of the
# reversing fix within half of what the vehicle could have driven in the step out of it
# beyond that step's chord (Tracker._dead_end_ahead): the step's time at REVERSE_PACE
# times the pace of the step into the fix (routes are longer than chords: corners,
# curves), and at least REVERSE_FLOOR_MPS, a town speed (36 km/h; the chord of a step
# round a corner into a dead end understates the pace). Chosen on bench/accuracy.py's
# drives, seed 31, 30 drives, 30 s (docs/measured.md, "Session 10 (reverse2)"): the
# pace alone (floor 0) or a floor of 6 m/s left the random walk on the test extract
# 0.22 points of final accuracy below the rule off, 10 m/s left it unchanged, routed
# trips kept their gain either way. REVERSE_SEARCH bounds the segments looked at.
REVERSE_PACE: Final = 1.5
REVERSE_FLOOR_MPS: Final = 10.0
REVERSE_SEARCH: Final = 256
# With MatchSettings.lone_reverse_turns, a reversal of the fixes opens a turn in the
# street only when the fixes did not reverse in the REVERSE_APART_S seconds before it
# (Tracker._lone_reversal). 180 s: a delivery van's trips between dwells take minutes
# (bench/accuracy.py's routed trips: 0.5-4 km); at 90 s the random walk of the bench
# still lost at 30 s on the test extract (route mismatch +0.1 points, seed 31), at 180 s
# and 300 s it was unchanged (docs/measured.md, "Session 12 (sparse30)").
REVERSE_APART_S: Final = 180.0
# With MatchSettings.lone_reverse_turns, a lone reversal opens a turn in the street only
# when the mean of the speeds of the two steps around the reversing fix is at most
# REVERSE_TURN_MPS (Tracker._slow_reversal): a vehicle that turns round in the street
# slows down or stops to turn (a van dwells there first), while an outlier fix makes the
# fixes reverse with two long, fast steps (out to the outlier and back), and a turn at
# the outlier then makes the path through it cheap enough that the spike test keeps it.
# On bench/accuracy.py's routed trips (80 drives, seeds 31 and 77, both extracts, 15 and
# 30 s; an engineer's diagnosis script, docs/measured.md "Session 13 (sparse30b)") the
# 115 lone reversals behind which the truth turned round (83 mid-road, 32 at a junction)
# went at 1.1-7.2 m/s by that mean, the 102 at an outlier fix at 2.9-25.7 m/s, 85 of
# them above 7.5 (chosen there, by judgement, not tuned further; from the same seeds that
# decide, so the headline seed 2009 is the held-out check).
REVERSE_TURN_MPS: Final = 7.5
# With MatchSettings.speed_laps (Tracker._with_laps): the share of the distance driven
# between two fixes (by their reported speeds) that the CUSUM leaves as slack (the
# trapezoid rule misses where the speed changes between fixes, and the answers err a few
# metres along the road), the reported speed below which a fix counts as standing (a
# receiver's Doppler speed errs by a few tenths of a m/s; common practice), and the
# shortest lap ever put in (m).
LAP_SLACK: Final = 0.2
LAP_STILL_MPS: Final = 0.5
LAP_MIN_M: Final = 10.0


class Level:
    """One rung of the eps ladder: its candidate tree and the bounds of its windows.

    Attributes:
        eps: metres.
        tree: the candidate tree; its live block holds the states at the newest fix
            (empty: dead).
        tree_seq: sequence number of the fix where the current candidate tree started.
        cert_seq, cert_t: first fix (sequence number, time) of the certificate window.
        trim_seq: the last fix at which old history of the tree was cut.
        cut: no back-pointer of the tree leads from a state at or after fix ``cut`` to
            one before it (-1: not known; not serialised, a restored level walks once).
            Lets :meth:`Tracker._trim` skip the walk while the cut stays where it was
            (:meth:`Tracker._settle` cuts in its commit check after a commit).
    """

    __slots__ = ("cert_seq", "cert_t", "cut", "eps", "tree", "tree_seq", "trim_seq")

    def __init__(self, eps: float) -> None:
        self.eps = eps
        self.tree = CandidateTree()
        self.tree_seq = 0
        self.cert_seq = 0
        self.cert_t = 0.0
        self.trim_seq = 0
        self.cut = -1



# commit points answered by the levels' steps of one fix: level -> (the tree asked,
# next_commit, newest, row) (Tracker._advance_levels, read by Tracker._settle)
_Tops = dict[Level, tuple[CandidateTree, int, int, int]]

# the compiled calls the tracker makes on every fix (the tree step, the live answer, the
# commit check), at their compiled code: the argument types never change, so the
# dispatcher's per-call type look-up is skipped (livematch.core._direct)
_CALLS: Final = Direct(tree_sweep=tree_sweep, live_answer=tree_live_answer,
                       cut_and_check=cut_and_check, all_within=all_within)


def _slide(fx: float, fy: float, ax: float, ay: float, ux: float, uy: float, length2: float,
           pos: float, ahead: bool) -> tuple[float, float, float]:
    """The point of a segment nearest a fix, not behind (or not ahead of) ``pos``: (t, x, y).

    The segment is (ax, ay) + t (ux, uy), t in [0, 1]; ``ahead`` keeps t >= ``pos``, else
    t <= ``pos``. The end-of-log and start-of-log stand rules move a stand's answers along
    one segment this way, so the answers stay monotone in time.
    """
    if length2 > 0.0:
        proj = ((fx - ax) * ux + (fy - ay) * uy) / length2
        pos = max(pos, min(1.0, proj)) if ahead else min(pos, max(0.0, proj))
    return pos, ax + pos * ux, ay + pos * uy

class Tracker:
    """Online map matching of one vehicle.

    Args:
        network: the road network (shared, read-only).
        vehicle: the vehicle id put on every event.
        settings: the matcher settings (validated here).

    Example (three fixes along a straight two-way road, then the end of the trip):
        >>> from livematch.core.build import Road, network_from_roads
        >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0), (200.0, 0.0)], way=7)])
        >>> tracker = Tracker(net, "bus-1")
        >>> events = []
        >>> for i, x in enumerate((10.0, 20.0, 30.0)):
        ...     events += tracker.update(Fix("bus-1", 1000.0 + i, 0.0, 0.0, x, 2.0))
        >>> [(e.eps_m, e.window_fixes, round(e.offset_m, 1)) for e in events
        ...  if e.kind == "assignment"]
        [(15.0, 1, 10.0), (15.0, 2, 20.0), (15.0, 3, 30.0)]
        >>> [len(e.fixes) for e in events + tracker.flush() if e.kind == "commit"]
        [3]
        >>> tracker.flush()  # nothing left to settle
        []
    """

    # slots: a service holds one tracker per vehicle, and an instance dict costs more
    # than a small candidate tree
    __slots__ = ("_commit", "_held", "_last", "_released", "_speed", "_stand", "_stood",
                 "_view", "agreed_seq", "along_last", "before", "buffer", "fix_n",
                 "fix_seq0", "fix_xy", "jumps", "lap_due", "lap_v", "last_seg", "last_v",
                 "levels", "network", "next_commit", "rev_t", "said", "seq", "settings",
                 "skipped", "stand_seq", "step_dir", "times", "times0", "vehicle")

    def __init__(
        self, network: RoadNetwork, vehicle: str, settings: MatchSettings | None = None
    ) -> None:
        self.network = network
        self.vehicle = vehicle
        self.settings = settings or MatchSettings()
        problems = self.settings.problems()
        if problems:
            key, what = problems[0]
            raise ValueError(f"matcher.{key} {what}")
        self._view: NetworkView = view_of(network)
        # a tuple, not a list: 64 bytes against 88 for three levels, and never resized
        self.levels: tuple[Level, ...] = tuple([Level(e) for e in self.settings.eps_levels])
        self.seq = 0
        # t, x, y of the last accepted fix (t NaN: none yet; read as ``last``). A tuple of
        # three floats, not an optional one: compiled, the three doubles are stored in the
        # tracker itself (24 bytes) rather than as a tuple and three float objects (136
        # bytes a vehicle; bench/memory.py step 6). The same for _stand and _commit.
        self._last: tuple[float, float, float] = (_NAN, _NAN, _NAN)
        # the time of the newest fix released to the filters (NaN: none yet; read as
        # ``last_released_t``); floats, not optional ones: unboxed in the compiled
        # tracker, as _speed and _stood (24 bytes a float object each)
        self._released = _NAN
        self.jumps = 0
        self._speed = _NAN  # implied speed of the last accepted step, m/s (NaN: none; ``speed``)
        # held-back fixes, and times of filtered fixes awaiting a final answer: tuples,
        # rarely not empty (the empty tuple is shared; an empty list is 56 bytes each)
        self.buffer: tuple[Fix, ...] = ()
        # the times of a contiguous run of accepted fixes up to the newest: fix times0 + i
        # at times[i] (unboxed doubles: a dict of float objects cost about 0.8 KB more a
        # live vehicle, bench/memory.py step 6); read with fix_time, or inline
        self.times: array[float] = array("d")
        self.times0 = 1
        self.next_commit = 1
        # seg, pos, seq, t of the last commit's final state (seq -1: none yet; read as
        # ``last_commit``)
        self._commit: tuple[int, float, int, float] = (-1, 0.0, -1, 0.0)
        self.skipped: tuple[float, ...] = ()
        self.last_seg = -1  # segment of the last assignment (breaks exact ties)
        # positions of the accepted fixes from fix_seq0 on (row i: fix fix_seq0 + i; the
        # first fix_n rows in use), for the live score; rows older than the last commit
        # are dropped when the array fills up
        self.fix_xy: np.ndarray = _NO_FIXES
        self.fix_seq0 = 1
        self.fix_n = 0
        self.before: _Before | None = None  # the state before the newest fix (spike test)
        # with stop_turns: the first fix (t, x, y) of the newest run of fixes within
        # STAND_SIGMAS sigma_m of it (t NaN: none; read as ``stand_from``), and the last
        # time such a run spanned STAND_S
        self._stand: tuple[float, float, float] = (_NAN, _NAN, _NAN)
        self._stood = _NAN  # (NaN: none; read as ``stood_t``)
        # with stand_hold: the first fix of the stand the vehicle is in now (0: none)
        self.stand_seq = 0
        # with smallest_agrees: the newest fix a larger level's agreed commit would have
        # settled, had it not left the commit to a smaller level (-1: none); the live
        # answer reads the fixes from there on, as it would after that commit
        self.agreed_seq = -1
        # with reverse_turns: the direction (radians) of the step into the last accepted
        # fix when it was at least REVERSE_MIN_M long, else None (Tracker._turned_round)
        self.step_dir: float | None = None
        # with lone_reverse_turns: the time of the fix at which the fixes last went back
        # the way they came (Tracker._lone_reversal), else None
        self.rev_t: float | None = None
        # with hold_filtered: the newest live answer, repeated for a filtered fix (its
        # fields after the vehicle, packed: _SAID)
        self.said: bytes | None = None
        # what _held_point found (held point and first fix -> (fix asked at, all within
        # eps)); a cache, not serialised, dropped when the vehicle does not stand
        self._held: dict[tuple[int, float, float, float], tuple[int, bool]] | None = None
        # with speed_laps: the reported speed (m/s) of each accepted fix not yet
        # committed, by fix time, and the distance driven that the committed path has
        # not shown yet (m; Tracker._with_laps)
        self.lap_v: dict[float, float] | None = None
        self.lap_due = 0.0
        # with speed_pace_m: the reported speed of the last accepted fix (m/s), if any
        self.last_v: float | None = None
        # with monotone_final: the final answer (segment, offset_m) of the fix committed
        # last, the bound the next commit's answers along the path must not fall below,
        # then the last block of that commit's fit (its mean along the path, from the
        # start of that segment, and its weight; 0: none) for monotone_pool
        self.along_last: tuple[int, float, float, float] | None = None

    def fix_time(self, seq: int) -> float | None:
        """The time of accepted fix ``seq`` while it is kept (``times``), else None.

        Kept: a contiguous run of fixes from one before the oldest not yet committed up
        to the newest.
        """
        i = seq - self.times0
        times = self.times
        return times[i] if 0 <= i < len(times) else None

    @property
    def last(self) -> tuple[float, float, float] | None:
        """(t, x, y) of the newest accepted fix, or None before the first."""
        last = self._last
        return None if math.isnan(last[0]) else last

    @last.setter
    def last(self, value: tuple[float, float, float] | None) -> None:
        self._last = (_NAN, _NAN, _NAN) if value is None else value

    @property
    def last_commit(self) -> tuple[int, float, int, float] | None:
        """(seg, pos, seq, t) of the last commit's final state, or None before the first."""
        last = self._commit
        return None if last[2] < 0 else last

    @last_commit.setter
    def last_commit(self, value: tuple[int, float, int, float] | None) -> None:
        self._commit = (-1, 0.0, -1, 0.0) if value is None else value

    @property
    def stand_from(self) -> tuple[float, float, float] | None:
        """With ``stop_turns``: (t, x, y) of the first fix of the newest stand run, or None."""
        stand = self._stand
        return None if math.isnan(stand[0]) else stand

    @stand_from.setter
    def stand_from(self, value: tuple[float, float, float] | None) -> None:
        self._stand = (_NAN, _NAN, _NAN) if value is None else value

    @property
    def last_released_t(self) -> float | None:
        """The time of the newest fix released to the filters, or None before the first."""
        t = self._released
        return None if math.isnan(t) else t

    @last_released_t.setter
    def last_released_t(self, value: float | None) -> None:
        self._released = _NAN if value is None else value

    @property
    def speed(self) -> float | None:
        """The implied speed of the last accepted step (m/s), or None before the second fix."""
        v = self._speed
        return None if math.isnan(v) else v

    @speed.setter
    def speed(self, value: float | None) -> None:
        self._speed = _NAN if value is None else value

    @property
    def stood_t(self) -> float | None:
        """With ``stop_turns``: the last time a run of fixes spanned ``STAND_S``, or None."""
        t = self._stood
        return None if math.isnan(t) else t

    @stood_t.setter
    def stood_t(self, value: float | None) -> None:
        self._stood = _NAN if value is None else value

    @property
    def last_time(self) -> float | None:
        """Time of the newest accepted fix, or None before the first."""
        t = self._last[0]
        return None if math.isnan(t) else t

    # ----------------------------------------------------------------- intake
    def update(self, fix: Fix) -> list[Event]:
        """Take one fix; return the events it causes (possibly none)."""
        events: list[Event] = []
        newest = self._released
        if not self.buffer and not self.settings.reorder_fixes and (
                math.isnan(newest) or fix.t > newest):
            # nothing held back and nothing to hold back: what _admit does with such a
            # fix (release it at once), without its generator and sorted insert
            self._released = fix.t
            if self._passes(fix, events):
                self._accept(fix, events)
            return events
        for ready in self._admit(fix, events):
            self._accept(ready, events)
        return events

    def flush(self) -> list[Event]:
        """Release held-back fixes and commit every pending fix (end of a log, eviction)."""
        events: list[Event] = []
        held, self.buffer = self.buffer, ()
        for ready in held:
            if self._passes(ready, events):
                self._accept(ready, events)
        covering = self._covering()
        if covering:
            level = covering[0]
            tree = level.tree
            score = self._flush_scores(level) if self.settings.flush_scored else None
            self._commit_chain(tree, tree.best(self.last_seg, score), events, prune=level,
                               settle_all=True)
        self.before = None  # what is committed stays: no fix is dropped after this
        return events

    def _flush_scores(self, level: Level) -> np.ndarray | None:
        """The live scores that rank the flush's candidates, or None (rank by path cost).

        Rule (``MatchSettings.flush_scored``): while the pending fixes come less than
        ``SPARSE_S`` apart (the median step of the fix times kept, which run from the
        last committed fix to the newest), the end-of-log flush commits the candidate
        with the lowest live score (:meth:`_live_scores`), as a forced commit does at
        such fixes, instead of the lowest path cost. Why: nothing after the last fix
        can make the candidates agree, and the path cost, which charges each fix's
        error as independent, picks the branch that a GNSS error leaning one way for
        the last tens of seconds favours (a road out of the junction the vehicle
        stands at, a road alongside); the live score charges the changes of a
        candidate's offset from the fixes, not the offset itself.

        Example (no fix yet: nothing to rank):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(flush_scored=True))
            >>> tracker._flush_scores(tracker.levels[0]) is None
            True
        """
        times = self.times
        if len(times) < 2:
            return None
        gaps = sorted(b - a for a, b in itertools.pairwise(times))
        if gaps[len(gaps) // 2] >= SPARSE_S:
            return None
        return self._live_scores(level)

    def _admit(self, fix: Fix, events: list[Event]) -> Iterator[Fix]:
        newest = self.last_released_t
        if (newest is not None and fix.t == newest) or any(b.t == fix.t for b in self.buffer):
            events.append(Filtered(fix.vehicle, fix.t, "duplicate"))
            return
        if newest is not None and fix.t < newest:
            events.append(Filtered(fix.vehicle, fix.t, "out_of_order"))
            return
        buffer = list(self.buffer)
        bisect.insort(buffer, fix, key=lambda f: f.t)
        released = max(0, len(buffer) - self.settings.reorder_fixes)
        self.buffer = tuple(buffer[released:])
        for ready in buffer[:released]:
            self.last_released_t = ready.t
            if self._passes(ready, events):
                yield ready

    def _passes(self, fix: Fix, events: list[Event]) -> bool:
        s = self.settings
        if fix.accuracy is not None and fix.accuracy > s.max_accuracy_m:
            events.append(Filtered(fix.vehicle, fix.t, "low_accuracy"))
            self.skipped += (fix.t,)
            if s.hold_filtered:
                self._say_held(fix.t, events)
            return False
        t0, x0, y0 = self._last
        if not math.isnan(t0):
            dt = fix.t - t0
            if dt <= 0:
                events.append(Filtered(fix.vehicle, fix.t, "out_of_order"))
                return False
            limit = s.max_speed_mps
            speed = self._speed
            if not math.isnan(speed):
                # the speed of the last step, changed by at most ACCEL_MPS2, plus three
                # standard deviations of the error of a difference of two fixes
                limit = min(limit, speed + ACCEL_MPS2 * dt
                            + 3.0 * math.sqrt(2.0) * s.sigma_m / dt)
            if math.hypot(fix.x - x0, fix.y - y0) > limit * dt:
                self.jumps += 1
                if self.jumps < JUMP_TRUST_AFTER:
                    events.append(Filtered(fix.vehicle, fix.t, "impossible_jump"))
                    self.skipped += (fix.t,)
                    if s.hold_filtered:
                        self._say_held(fix.t, events)
                    return False
        self.jumps = 0
        return True

    def _say_held(self, t: float, events: list[Event]) -> None:
        """With ``hold_filtered``: the live answer for a fix the filters refused at time ``t``.

        A refused fix (an impossible jump, a reported accuracy too poor) is no evidence of
        where the vehicle is, but it says the vehicle is still reporting: what a dispatcher
        expects at that moment is the vehicle where it was last matched, not no answer.
        So the newest live answer is published again at the refused fix's time, the same
        point on the same segment, with the same certificate (``eps_m``, ``window_fixes``,
        ``window_s``): the fixes of that window, all accepted and none newer than the
        answer, lie within Fréchet distance eps of a road path ending there; the refused
        fix is in no window. Only while the answer is at most ``gap_s`` old (a longer time
        is a gap, where the vehicle may be anywhere within the bridge's reach), and not
        after a fix found no road nearby. The event follows the ``Filtered`` one, so a
        consumer that pairs fixes with events (the pipeline's monitors) still treats the
        fix as refused. The final answer of such a fix is unchanged
        (:meth:`_fill_skipped`).
        """
        said = self.said
        if said is None:
            return
        said_t, seg, offset_m, x, y, eps_m, window_fixes, window_s = _SAID.unpack(said)
        if not 0.0 < t - said_t <= self.settings.gap_s:
            return
        events.append(HeldAssignment(self.vehicle, t, seg, offset_m, x, y, eps_m, window_fixes,
                                     window_s))

    # ------------------------------------------------------------------ sweep
    def _accept(self, fix: Fix, events: list[Event]) -> None:
        s = self.settings
        prev = self.last
        # The state before this fix, kept so that the next fix can still drop this one
        # (the spike test); only a sparse vehicle's fixes are tested.
        before = (self._state_before() if s.spike_cost > 0.0 and prev is not None
                  and SPIKE_MIN_S <= fix.t - prev[0] <= SPIKE_MAX_S else None)
        # whether the newest fix broke every level's tree (none goes on from before it)
        # (asked only when the spike test will run: it is the only reader)
        broke = self.before is not None and not any(_goes_on(lv, self.seq)
                                                     for lv in self.levels)
        # whether every level refused the newest fix (a Filtered event already said so:
        # dropping it as a spike then says nothing again, so each fix is counted once)
        refused = self.before is not None and not any(lv.tree.hi > lv.tree.lo
                                                      for lv in self.levels)
        self.seq += 1
        seq = self.seq
        times = self.times
        if not times:
            self.times0 = seq
        times.append(fix.t)  # fix seq: the run of times is contiguous up to seq - 1
        self._log_fix(fix.x, fix.y)
        if s.speed_laps and fix.speed is not None:
            if self.lap_v is None:
                self.lap_v = {}
            self.lap_v[fix.t] = fix.speed
        self._last = (fix.t, fix.x, fix.y)
        came_v = self.last_v  # reported speed at prev (speed_pace_m reads it)
        if s.speed_pace_m > 0.0:
            self.last_v = fix.speed
        came_speed = self.speed  # of the step into prev (reverse_turns reads it)
        stood = self._speed < STOOD_MPS  # (False while NaN: no step yet)
        if s.stop_turns:
            lately = self._stood_lately(fix, prev[0] if prev is not None else None)
            stood = stood or lately
        if prev is not None and fix.t > prev[0]:
            self._speed = math.hypot(fix.x - prev[1], fix.y - prev[2]) / (fix.t - prev[0])
        dt = fix.t - prev[0] if prev is not None else 0.0
        # (asked only with reverse_turns, reverse_turns_near or lone_reverse_turns: a
        # bridge may then turn in the street, anywhere or only near prev)
        turned = ((s.reverse_turns or s.reverse_turns_near or s.lone_reverse_turns)
                  and self._turned_round(fix, prev, dt)
                  and self._lone_reversal(prev)
                  and self._slow_reversal(came_speed)
                  and not self._dead_end_ahead(fix, prev, dt, came_speed))
        tops: _Tops = {}
        salvage = self._advance_levels(fix, prev, seq, stood or (turned and s.reverse_turns),
                                       seq - 1 if before is not None else seq, tops,
                                       turned and not s.reverse_turns, came_v)
        if self.before is not None and prev is not None:
            straight_from = self.before.last
            dropped = self._spike_test(fix, seq, broke, refused, events)
            if dropped is not None:
                # the fix before this one was a spike: this fix now follows the one
                # before that; it is not tested in turn (two spikes in a row are rare,
                # and a chain of drops would bridge ever longer gaps)
                seq, salvage = dropped
                before = None
                if straight_from is not None:
                    dt = fix.t - straight_from[0]
                    if s.reverse_turns or s.reverse_turns_near or s.lone_reverse_turns:
                        # the step now starts there
                        self.step_dir = _step_dir(straight_from, fix)
        self.before = before
        deciding = None
        for level in self.levels:
            if level.tree.hi > level.tree.lo:
                deciding = level
                break
        if deciding is None:
            events.append(Filtered(fix.vehicle, fix.t, self._refused_reason(fix)))
            self.said = None  # every level refused it: no answer to repeat
        else:
            best, split = self._live_answer(deciding, dt)
            recent = 0
            if s.stand_hold:
                self.stand_seq, recent = self._stand_start(seq)
                if not recent and self._held is not None:
                    self._held = None
            # (each hold asked only when it can hold: most fixes have neither)
            held = self._hold_at_junction(deciding, best, split, fix) if split >= 0 else None
            if held is None and recent:
                held = self._hold_at_stand(deciding, best, seq, recent)
            tree = deciding.tree
            if held is None:
                seg, pos, x, y = tree.point(self._view, best)
                self.last_seg = seg  # the best row's own segment (before the swap below)
                if pos <= 0.0 and s.vertex_in_segment:
                    seg_in = self._came_in_by(tree, best)
                    if seg_in >= 0:
                        seg, pos = seg_in, 1.0
            else:
                seg, pos, x, y = held
                self.last_seg = tree.seg_of(best)
            t = fix.t
            offset_m = pos * self._view.slen[seg]
            window_fixes = seq - deciding.cert_seq + 1
            window_s = t - deciding.cert_t
            events.append(Assignment(self.vehicle, t, seg, offset_m, x, y, deciding.eps,
                                     window_fixes, window_s))
            if s.hold_filtered:
                self.said = _SAID.pack(t, seg, offset_m, x, y, deciding.eps, window_fixes,
                                       window_s)
        self._settle(seq, fix.t, dt, salvage, events, hold_newest=before is not None,
                     tops=tops, stood=stood)
        if self._beam_at(dt):
            self._beam()
        if prev is not None and fix.t - prev[0] >= SPARSE_S:
            # a vehicle reporting this rarely spends most of its time idle: keep its
            # trees without spare room (a compaction per level; decisions unchanged)
            for level in self.levels:
                level.tree.shrink()

    def _beam_at(self, dt: float) -> bool:
        """Whether the beam thins at a fix ``dt`` seconds after the previous accepted one.

        On with ``beam_margin`` or ``beam_keep``; with ``beam_max_gap_s`` only within that
        gap, never at a vehicle's first fix (``dt`` 0). :meth:`_accept` thins by it and
        :meth:`_settle` keeps the thinned level out of the agreement by it: one gate.
        """
        s = self.settings
        return (s.beam_margin > 0.0 or s.beam_keep > 0) \
            and (s.beam_max_gap_s <= 0.0 or 0.0 < dt <= s.beam_max_gap_s)

    def _beam(self) -> None:
        """Rule ``beam_margin`` / ``beam_keep``: thin the live states of the fallback levels.

        Every live level above the smallest live one keeps only the states near its best
        (:meth:`CandidateTree.beam`), except the smallest level covering the oldest
        pending fix when that is not the smallest live one: a forced commit reads that
        level's best by live score, which the path cost's beam could drop. The smallest
        live level decides the live answer and is never thinned. The thinned levels are
        then the covering levels after the first (and the live ones not covering):
        :meth:`_settle` lets none of them commit by agreement, as their states agree
        because states were dropped (a first build that let them lost final answers at
        1 s: docs/measured.md, "Session 30 (beam30)"). Run after the fix's commits, so
        the states that fix settled are those without the rule; the next step sweeps
        from the kept states. Why: memory (``MatchSettings.beam_margin``).

        Refinements (docs/measured.md, "Session 31 (beam31)"): ``beam_guard`` keeps in
        each thinned level the states whose segment the next smaller live level holds
        live (the fallback keeps the roads the decider still holds); ``beam_moving``
        thins nothing during a stand (``stand_seq``); ``beam_top`` thins the largest
        level only (the levels between stay whole and commit by agreement as without
        the rule). Session 32: with ``beam_max_gap_s`` the caller runs it only at a fix
        within that gap of the previous accepted one (:meth:`_settle` keeps the same
        gate on the commit rule), so a sparse reporter is matched as without the beam.

        Example (a fresh tracker: no live level, nothing to thin):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(beam_keep=2))
            >>> tracker._beam()
            >>> [len(lv.tree) for lv in tracker.levels]
            [0, 0, 0]
        """
        s = self.settings
        if s.beam_moving and self.stand_seq:
            return  # a stand: no level thinned (MatchSettings.beam_moving)
        first = self.next_commit
        covered = False
        guard: CandidateTree | None = None  # the next smaller live level's tree
        top = self.levels[-1]
        for level in self.levels:
            tree = level.tree
            if tree.hi <= tree.lo:
                continue
            if guard is None:
                guard = tree  # the smallest live level: never thinned
                covered = level.tree_seq <= first
                continue
            if not covered and level.tree_seq <= first:
                covered = True  # the smallest covering level: left whole
            elif tree.hi - tree.lo > 1 and (level is top or not s.beam_top):
                tree.beam(s.beam_margin, s.beam_keep, self.last_seg,
                          guard if s.beam_guard else None)
            guard = tree

    def _refused_reason(self, fix: Fix) -> str:
        """Why no level matched ``fix``: ``no_road_nearby`` or ``road_beyond_eps``.

        Every level's window died at ``fix`` and no road lies within the largest eps of
        it (the largest level found none to start afresh on). With ``off_network_m``
        above the largest eps, a road within that radius makes the fix
        ``road_beyond_eps`` (not off the network: the shell's off-network monitor does
        not count it); otherwise, and always with the default radius (no query of its
        own), ``no_road_nearby``. The spatial index is asked only here, at a fix every
        level refused, which is rare.

        Example (one road along y = 0; a fix 40 m off it, ladder 15 / 30 m):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (500.0, 0.0)], way=1)])
            >>> fix = Fix("v", 0.0, 0.0, 0.0, 100.0, 40.0)
            >>> Tracker(net, "v", MatchSettings(eps_levels=(15.0, 30.0)))._refused_reason(fix)
            'no_road_nearby'
            >>> Tracker(net, "v", MatchSettings(eps_levels=(15.0, 30.0), off_network_m=60.0)
            ...         )._refused_reason(fix)
            'road_beyond_eps'
        """
        radius = self.settings.off_network_m
        if radius > self.levels[-1].eps and len(self.network.segments_near(fix.x, fix.y,
                                                                             radius)):
            return "road_beyond_eps"
        return "no_road_nearby"

    def _advance_levels(
        self, fix: Fix, prev: tuple[float, float, float] | None, seq: int,
        stood: bool = False, newest: int = -1, tops: _Tops | None = None,
        turned: bool = False, came_v: float | None = None,
    ) -> list[tuple[Level, CandidateTree]]:
        """Move every level to ``fix`` (sequence number ``seq``) from the fix ``prev``.

        Sweep, else bridge, else start afresh (:func:`livematch.core.sweep.advance`).
        ``stood``: the step into ``prev`` was slower than ``STOOD_MPS`` (the vehicle stood
        there), which with ``stop_turns`` lets a bridged step turn round at any vertex.
        ``turned``: with ``reverse_turns_near``, the fixes reversed at ``prev``: a bridged
        step may turn round at the vertex ending each live state's segment near ``prev``.
        ``came_v``: the reported speed at ``prev`` (with ``speed_pace_m``; None when
        unknown, and then the new fix's speed alone sets the distance driven).
        Returns the levels that started afresh with the trees they had before.
        With ``stand_pace``, a bridged step that :func:`stand_step` calls a stand charges
        no pace term and may turn round at a vertex within eps of ``prev`` without the
        street charge (unless ``stood`` opened every vertex already).

        ``tops``: with ``newest`` >= 0, each swept level that covers fix ``next_commit``
        gets its commit point (:meth:`CandidateTree.commit_point` for ``next_commit``
        and ``newest``) from the same compiled call as its step, recorded here for
        :meth:`_settle` (a commit check per covering level per fix, otherwise a call each).
        """
        s = self.settings
        if prev is None:
            x0, y0, dt = fix.x, fix.y, 0.0
        else:
            x0, y0, dt = prev[1], prev[2], fix.t - prev[0]
        chord = math.hypot(fix.x - x0, fix.y - y0)
        gap = prev is not None and (dt > s.gap_s or chord > s.gap_m)
        salvage: list[tuple[Level, CandidateTree]] = []
        still = s.stand_pace and gap and stand_step(dt, chord, s.gap_s,
                                                    STAND_SIGMAS * s.sigma_m)
        # the step scalars, written into the network's scratch (a new array costs more)
        arrays = sweep_arrays(self._view)
        step = arrays.step
        step[1] = x0
        step[2] = y0
        step[3] = fix.x
        step[4] = fix.y
        step[5] = chord
        if arrays.step_for is not s:
            # the weights (_weights_of), written when another tracker's settings wrote
            # them last: none kept per tracker (a tuple and its floats, 144 bytes)
            w = _weights_of(s)
            step[6] = w[0]
            step[7] = w[1]
            step[8] = w[2]
            step[9] = w[3]
            step[10] = w[4]
            arrays.step_for = s
        if s.motion_step:  # step[9] moves with dt: written at every fix
            inv_motion = 1.0 / s.motion_m  # (_weights_of's)
            step[9] = inv_motion * motion_gain(dt, s.error_tau_s) if dt > 0.0 else inv_motion
        # MatchSettings.heading_cost: the fix's heading in the grid, when it counts
        head = (grid_heading(self.network.projection, fix.x, fix.y, fix.heading)
                if s.heading_cost > 0.0 and fix.heading is not None
                and (fix.speed is None or fix.speed >= HEADING_MIN_MPS) else None)
        if head is not None and not (math.isfinite(head[0]) and math.isfinite(head[1])):
            head = None  # a point the projection cannot turn (far outside its area)
        # MatchSettings.class_cost_m: the charge of a state on a minor road, per fix
        minor = s.class_cost_m / s.beta_m
        first = self.next_commit
        t = fix.t
        # CandidateTree.step, its compiled call made here (a Python call fewer per
        # level); the kernel's buffers are read again after a step that grew them
        # (its answer typed: compiled, a tuple of known items unpacks without iterating)
        sweep: Callable[..., tuple[int, int, int]] = _CALLS.tree_sweep
        netf, neti, fbuf, ibuf = arrays.netf, arrays.neti, arrays.fbuf, arrays.ibuf
        bridged: list[Level] = []  # the levels whose window died (or every one, at a gap)
        for level in self.levels:
            tree = level.tree
            if tree.hi > tree.lo and not gap:
                step[0] = level.eps
                # the commit check only for a level that covers the oldest pending fix
                # (Tracker._covering: alive, its tree no newer than that fix)
                ask = newest if tops is not None and level.tree_seq <= first else -1
                top, lo, hi = sweep(netf, neti, fbuf, ibuf, step, tree.ti, seq, t, first,
                                    ask)
                if top >= DIED:
                    tree.lo = lo
                    tree.hi = hi
                else:
                    top = tree.step_rest(arrays, step, seq, t, first, ask, top)
                    netf, neti, fbuf, ibuf = arrays.netf, arrays.neti, arrays.fbuf, arrays.ibuf
                if top != DIED:
                    if tops is not None and ask >= 0:
                        tops[level] = (tree, first, ask, top)
                    if minor > 0.0:
                        _charge_class(tree, arrays, minor)
                    if head is not None:
                        _charge_heading(tree, arrays, self.network.seg_len, head, s)
                    continue
            # the window died (or the step is a gap): bridge, else start afresh (below)
            bridged.append(level)
        if not bridged:
            return salvage  # (every level swept, as nearly always at 1 s between fixes)
        # The levels bridge after the sweeps, from the largest eps down, sharing their own
        # searches (sweep.SharedSearches: the largest eps asks about the most targets and
        # reaches furthest, so the smaller levels' repeats are answered). A level's step
        # reads and writes only its own tree and fields, so the order changes nothing
        # else; the levels that started afresh are listed in the ladder's order still.
        shared = SharedSearches() if len(bridged) > 1 else None
        salvaged: dict[int, CandidateTree] = {}
        for n_done, level in enumerate(reversed(bridged), start=1):
            if shared is not None:
                shared.keep = n_done < len(bridged)
            tree = level.tree
            ctx = StepContext.between(self._view, s, level.eps, x0, y0, fix.x, fix.y, seq,
                                      fix.t, stood, turned)
            if step[9] != ctx.motion_cost:
                ctx = dataclasses.replace(ctx, motion_cost=step[9])
            if still and not ctx.street_turns:
                # a step that stood may turn round where it stood (at a vertex within eps
                # of its first fix, as turn_near opens) with no street charge
                ctx = dataclasses.replace(ctx, pace_free=True, turn_near=True,
                                          street_turn_cost=0.0)
            elif still:
                ctx = dataclasses.replace(ctx, pace_free=True)
            if s.speed_pace_m > 0.0 and fix.speed is not None and dt > s.gap_s:
                # the least distance driven from the reported speeds
                # (MatchSettings.speed_pace_m): the slower end's speed, less slack
                v = fix.speed if came_v is None else min(fix.speed, came_v)
                ctx = dataclasses.replace(ctx, speed_route=SPEED_FLOOR_SHARE * v * dt,
                                          pace_cost=1.0 / s.speed_pace_m)
            nodes, rows = tree.live_nodes(self._view)
            new, how = advance(self.network, nodes, ctx, s, dt, gap=True, shared=shared)
            if how == "bridged":
                tree.extend(new, rows)
                level.cert_seq, level.cert_t = seq, fix.t
            else:
                if len(tree):
                    salvaged[id(level)] = tree
                level.tree = CandidateTree()
                level.tree.extend(new, {})
                level.tree_seq = level.trim_seq = level.cert_seq = seq
                level.cert_t = fix.t
            if minor > 0.0:
                _charge_class(level.tree, arrays, minor)
            if head is not None:
                _charge_heading(level.tree, arrays, self.network.seg_len, head, s)
        for level in bridged:
            if id(level) in salvaged:
                salvage.append((level, salvaged[id(level)]))
        return salvage

    # ------------------------------------------------------------- spike test
    def _state_before(self) -> _Before:
        """A copy of the matching state as it is now (before the next fix)."""
        return _Before(self.last, self.speed, self.last_seg,
                       tuple([_copy_level(lv) for lv in self.levels]))

    def _spike_test(
        self, fix: Fix, seq: int, broke: bool, refused: bool, events: list[Event]
    ) -> tuple[int, list[tuple[Level, CandidateTree]]] | None:
        """Decide, one fix late, whether the fix before ``fix`` was a spike; drop it if so.

        The levels have just been moved to ``fix`` (sequence number ``seq``) through the
        suspect, fix ``seq - 1``. The test leaves the suspect out and looks at what that
        does to the fit of the path (a leave-one-out test, like the deleted-residual
        outlier diagnostics of regression, e.g. Cook, Technometrics 1977; from memory).
        Dropping a fix is charged ``spike_cost`` for two 15 s steps, in proportion to the
        time the two steps span (the noise of a step's cost grows with its length), so
        this is the likelihood-ratio test of a measurement model with a small constant
        chance of a fix being anywhere (a Gaussian plus a uniform outlier component;
        common practice in robust estimation, from memory).

        1. Gate: at the smallest level whose tree goes on through the suspect, if the
           best path cost rose by at most the charge over the two steps, nothing without
           the suspect can be better by the charge: keep it (no second computation).
        2. Otherwise the levels are also moved to ``fix`` straight from the state before
           the suspect. At the smallest level whose tree goes on both ways, the suspect
           is dropped when the straight way costs more than the charge less and its own
           step cost rose by at most the charge (when ``fix`` is itself a spike, the
           straight way, over twice the time, reaches it more easily: that must not
           drop the good fix before it).
        3. If no level goes on both ways: dropped when the suspect broke every tree (or
           met no road) or the straight way's step cost rose by at most the charge, at
           the smallest level where it goes on.

        ``broke``: no level's tree went on through the suspect from before it.
        ``refused``: no level matched the suspect (its ``Filtered`` event, with the reason
        no level took it, is out already): a drop appends no ``spike`` event, so a fix is
        counted once among the filtered.
        Returns None when the suspect stays (the levels are as they were), else the
        sequence number ``fix`` now has and the levels that started afresh in the
        straight way. A dropped fix is reported as filtered (``spike``); its final answer
        is interpolated along the committed path like any filtered fix's.
        """
        before = self.before
        assert before is not None and before.last is not None
        s = self.settings
        suspect = seq - 1
        through = self.levels
        # the noise of a step's transition terms grows with its length: the charge is
        # spike_cost for two 15 s steps, in proportion to the time they span
        charge = s.spike_cost * (fix.t - before.last[0]) / SPIKE_SPAN_S
        first = next((i for i, lv in enumerate(through)
                      if len(lv.tree) and lv.tree_seq < suspect), -1)
        if first >= 0 and len(before.levels[first].tree):
            rise = _best_cost(through[first].tree) - _best_cost(before.levels[first].tree)
            if rise <= charge:
                return None  # the straight way cannot cost spike_cost less than this
        times = self.times
        kept = (self.speed, times[suspect - self.times0])
        self.levels = tuple([_copy_level(lv) for lv in before.levels])
        self.seq = suspect
        del times[-1]  # fix seq's: this fix takes the suspect's number
        times[suspect - self.times0] = fix.t
        t0, x0, y0 = before.last
        self.speed = math.hypot(fix.x - x0, fix.y - y0) / (fix.t - t0)
        stood = before.speed is not None and before.speed < STOOD_MPS
        salvage = self._advance_levels(fix, before.last, suspect, stood)
        drop: bool | None = None
        for i, (a, b) in enumerate(zip(through, self.levels, strict=True)):
            if _goes_on(a, suspect) and _goes_on(b, suspect):
                # the straight way must also be an ordinary step: when this fix is the
                # spike, the straight way reaches it more easily (a longer time) and
                # would wrongly drop the good fix before it
                drop = (_best_cost(b.tree) + charge < _best_cost(a.tree)
                        and _best_cost(b.tree) - _best_cost(before.levels[i].tree) <= charge)
                break
        if drop is None:
            # no level goes on both ways: drop when the suspect broke every tree (or met
            # no road), or when the straight way's cost rose by at most the charge
            on = next((i for i, lv in enumerate(self.levels) if _goes_on(lv, suspect)), -1)
            drop = on >= 0 and (broke or _best_cost(self.levels[on].tree)
                                - _best_cost(before.levels[on].tree) <= charge)
        if not drop:
            self.levels = through
            self.seq = seq
            self.speed, times[suspect - self.times0] = kept
            times.append(fix.t)
            return None
        t_suspect = kept[1]
        # this fix takes the suspect's sequence number, so its position takes the
        # suspect's row of the fix log (the suspect is not committed: the row is there)
        row = suspect - self.fix_seq0
        self.fix_xy[row, 0] = fix.x
        self.fix_xy[row, 1] = fix.y
        self.fix_n = row + 1
        if not refused:
            events.append(Filtered(fix.vehicle, t_suspect, "spike"))
        skipped = list(self.skipped)
        bisect.insort(skipped, t_suspect)
        self.skipped = tuple(skipped)
        self.next_commit = min(self.next_commit, suspect)
        self.agreed_seq = min(self.agreed_seq, suspect - 1)
        self.last_seg = before.last_seg
        return suspect, salvage

    def _fix_floor(self, suspect: int) -> int:
        """The oldest fix whose position a live score may still read.

        The last committed fix (``next_commit - 1``): a live score walks the candidates'
        links back to it. While the spike test of fix ``suspect`` is pending (``before``
        kept), the fix before ``suspect`` if ``suspect`` is already past the commit point
        (a fix no tree covers moves the commit point past itself): dropping it as a spike
        takes the commit point back to it (:meth:`_spike_test`), and the fix before it is
        then the last committed one again. The fix log and the checkpoint both keep from
        here, so a restored tracker reads what one never stopped reads, whatever the
        log's room.
        """
        floor = self.next_commit
        if self.before is not None and suspect < floor:
            floor = suspect
        return floor - 1

    def _log_fix(self, x: float, y: float) -> None:
        """Keep the position of the fix just accepted (sequence number ``self.seq``)."""
        n = self.fix_n
        if n == len(self.fix_xy):
            # full: drop what no live score reads any more (older than _fix_floor),
            # then leave room for half as many rows again as are kept (at least half
            # FIX_LOG_ROOM; FIX_LOG_ROOM rows at least: as many again, the room until
            # session 23, was most of the log's bytes at 1 Hz, bench/memory.py step 6)
            # (the fix just accepted is self.seq: the pending spike test is its
            # predecessor's)
            drop = min(n, max(0, self._fix_floor(self.seq - 1) - self.fix_seq0))
            kept = self.fix_xy[drop:n]
            least = FIX_LOG_ROOM // 2
            size = max(FIX_LOG_ROOM, len(kept) + max(least, len(kept) // 2))
            if drop and len(kept) + least <= n <= size:
                # about that size already (the usual case): the kept rows moved down in
                # place, no new array (numpy copies overlapping slices as if through a
                # buffer)
                self.fix_xy[:n - drop] = kept
            else:
                self.fix_xy = np.empty((size, 2))
                self.fix_xy[:len(kept)] = kept
            self.fix_seq0 += drop
            n = self.fix_n = len(kept)
        self.fix_xy[n, 0] = x
        self.fix_xy[n, 1] = y
        self.fix_n = n + 1

    def _live_scores(self, level: Level) -> np.ndarray | None:
        """The live score of each of the level's live states, or None (rank by cost).

        Rule (``error_tau_s`` > 0): the live answer goes to the candidate with the lowest
        :func:`livematch.core.sweep.live_score`, which rescores the distance terms along
        the candidate's path back to the last commit for GNSS error that is correlated in
        time. Why: with the error leaning towards a side road or a parallel road for tens
        of seconds, the plain path cost keeps a wrong branch best until it dies, and the
        live answer stays wrong that long (final answers were right: the commit waits for
        the branches to merge). A forced commit (``max_lag_fixes`` / ``max_lag_s``) uses
        the same score while fixes come less than ``SPARSE_S`` apart: where two roads run
        side by side for longer than the lag, it is what decides the final answer (on
        tuning drives at 1 s it raised final accuracy; at 5 s it did not help, and there
        the path cost decides as before).
        """
        s = self.settings
        tree = level.tree
        if s.error_tau_s <= 0.0 or len(tree) < 2:
            return None
        return tree.live_scores(self._view, self.fix_xy[:self.fix_n], self.fix_seq0,
                                self._live_from() - 1, 1.0 / (2.0 * s.sigma_m * s.sigma_m),
                                s.error_tau_s, s.gap_s)

    def _live_answer(self, level: Level, dt: float) -> tuple[int, int]:
        """The deciding level's best live row and the junction its near-best set split at.

        ``(best, split)``, split -1 if none: the ranking of :meth:`_live_scores` (the live
        score, or the path cost) and the near-best margin of :meth:`_hold_at_junction`,
        in one compiled call (:meth:`CandidateTree.live_answer`).
        """
        tree = level.tree
        if tree.hi - tree.lo == 1:
            # one live state (a sixth to a half of fixes): it is the best, and no
            # near-best set can split; what the compiled call answers, without the call
            return tree.lo, -1
        s = self.settings
        scored = s.error_tau_s > 0.0 and len(tree) >= 2
        margin = s.junction_hold
        if scored and 0.0 < dt <= s.gap_s:
            # the newest link was rescored, its distance terms weighted 1 / (1 - rho^2):
            # the margin widens with the square root of that weight (tuned, see
            # _hold_at_junction)
            rho = math.exp(-dt / s.error_tau_s)
            margin /= math.sqrt(1.0 - rho * rho)
        # (CandidateTree.live_answer's compiled call, made here: a Python call fewer)
        answer: tuple[int, int] = _CALLS.live_answer(
            sweep_arrays(self._view).seg_geo, tree.ti, self.last_seg, self.fix_xy,
            self.fix_n, self.fix_seq0, self._live_from() - 1,
            1.0 / (2.0 * s.sigma_m * s.sigma_m), 1.0 / s.error_tau_s if scored else 0.0,
            s.gap_s, margin)
        best, split = answer
        if split >= 0 and self._cut_by_deferral(tree, split):
            # smallest_agrees deferred a commit: the links older than the agreed fix,
            # which that commit would have cut, do not join the near-best set either
            split = -1
        if (s.live_keep > 0.0 and 0.0 < dt <= SPARSE_S and self.last_seg >= 0
                and tree.seg_of(best) != self.last_seg
                and tree.seg_of(best) != self.network.seg_twin.item(self.last_seg)
                and (s.live_keep_stand_s <= 0.0 or self._stood_for(s.live_keep_stand_s))):
            kept = self._keep_segment(level, best, scored)
            if kept is not None:
                best, score = kept
                split = tree.junction_split(best, margin, score) if margin > 0.0 else -1
        return best, split

    def _keep_segment(self, level: Level, best: int,
                      scored: bool) -> tuple[int, np.ndarray] | None:
        """Rule ``live_keep``: the best live row on the last answer's segment, if nearly best.

        ``(row, ranking)`` (the ranking every live row was scored by, in row order) when
        a live row of ``level`` lies on the segment of the previous live answer
        (``last_seg``) and ranks within ``live_keep`` of ``best`` (live score, or path
        cost when the score is off); None otherwise.

        Why: GNSS error is correlated in time; a lean of a few metres towards a side
        road, the other carriageway or a road alongside, lasting a few fixes, makes the
        candidate on that road rank best by a small margin, and the live answer jumps
        there and back. Among the deciding level's live candidates the road the answer
        was already on keeps it until another candidate beats it by ``live_keep``: a
        small hysteresis (an answer switches on evidence, not on every slight lean).
        Every live row of the deciding level has the same certificate (all are within
        Fréchet distance eps of the window), so the certificate is unchanged.

        Not when the best row is on the reverse of the last answer's segment: a turn
        round shows in the fixes' motion, not in a lean (on 20 random-walk drives, test
        extract, 1 s, seed 31, the rule without this kept the old direction after dead-end
        turns: 16 of its 33 new misses while moving; throwaway run, as below).

        Only for fixes at most ``SPARSE_S`` apart (asked by :meth:`_live_answer`): at 15 s
        between fixes a vehicle drives past several segments, and a candidate still on
        the last answer's segment is one that stood or turned back (on 20 random-walk
        drives at 15 s, seed 77, the rule without this bound cost 1.5 points of live
        accuracy; an engineer's throwaway run, docs/measured.md "Session 11 (livemove)").
        """
        s = self.settings
        tree = level.tree
        score = self._live_scores(level) if scored else None
        if score is None:
            score = tree.costs().copy()
        segs = tree.ti[ROW_I * tree.lo + K_SEG:ROW_I * (tree.hi - 1) + K_SEG + 1:ROW_I]
        on = np.flatnonzero(segs == self.last_seg)
        if not len(on):
            return None
        k = int(on[np.argmin(score[on])])
        if score[k] <= score[best - tree.lo] + s.live_keep:
            return tree.lo + k, score
        return None

    def _stood_for(self, window_s: float) -> bool:
        """Whether the accepted fixes of the last ``window_s`` seconds all lie near the newest.

        True when the fix log holds the fixes back to one at least ``window_s`` seconds
        before the newest, and every one of them from there on lies within
        ``STAND_SIGMAS`` x ``sigma_m`` of the newest fix (the radius of
        :meth:`_stand_start`): the vehicle stood that long, as far as GNSS noise lets
        it be told. False when the log does not reach back that far (a fix older than
        the last commit may be gone; the answer is then "not known to stand").

        For ``live_keep_stand_s`` (asked by :meth:`_live_answer`): the hysteresis holds
        the answer only while the vehicle stands. Why: on the random walk
        (``bench/accuracy.py --sim plain``) the keep lost live accuracy while moving (a
        lag at a true turn onto a branch or a road alongside, a kept point metres behind
        the vehicle), and a bound on where the kept point lies did not separate those
        losses from the gains (docs/measured.md "Session 12 (livepick)").

        Example (fixes 1 s apart within 1 m for 20 s: stood 20 s, not 30 s):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1")
            >>> for i in range(21):
            ...     _ = tracker.update(Fix("v1", float(i), 0.0, 0.0, 50.0 + i % 2, 1.0))
            >>> tracker._stood_for(20.0), tracker._stood_for(30.0)
            (True, False)
        """
        seq = self.seq
        times = self.times
        i = seq - self.times0  # fix seq's time at times[i] (if 0 <= i < len(times))
        row = seq - self.fix_seq0
        if not 0 <= i < len(times) or not 0 <= row < self.fix_n:
            return False
        xy = self.fix_xy
        x = xy.item(row, 0)
        y = xy.item(row, 1)
        radius = STAND_SIGMAS * self.settings.sigma_m
        r2 = radius * radius
        since = times[i] - window_s
        # (the times kept reach back to the last committed fix; with smallest_agrees,
        # no further than the fix a deferred commit would have settled)
        i_min = max(0, self._live_from() - 1 - self.times0)
        while True:
            i -= 1
            row -= 1
            if row < 0 or i < i_min:
                return False
            dx = xy.item(row, 0) - x
            dy = xy.item(row, 1) - y
            if dx * dx + dy * dy > r2:
                return False
            if times[i] <= since:
                return True

    def _came_in_by(self, tree: CandidateTree, row: int) -> int:
        """The segment row ``row``'s path entered its segment from, or -1 if not known.

        With ``vertex_in_segment``, an answer at the very start of a segment (position
        0: the fix projects on or before the vertex, so the vehicle has driven none of
        the segment) is reported at the end of this segment instead: the same point, on
        road the candidate's path has driven. At a stop just before a branch the path
        may later leave by another way; the segment it came in by is driven either way.
        """
        seg, _seq, parent, via0, vias = tree.row_ints(row)
        if vias:
            return tree.via(via0 + vias - 1)
        if parent >= 0:
            seg_in = tree.seg_of(parent)
            if seg_in != seg:
                return seg_in
        return -1

    def _hold_at_junction(
        self, level: Level, best: int, split: int, fix: Fix
    ) -> tuple[int, float, float, float] | None:
        """The live answer while the best candidate has just taken a branch, or None.

        When the candidates that score nearly as well as the best one (within
        ``junction_hold`` of its live score, or of its path cost when the score is off)
        went separate ways at a junction (row ``split`` from :meth:`_live_answer`, -1 if
        they did not), which branch was taken is not yet known; the answer
        then stays on the road they all came from, at the junction where they split, as
        long as the fix is within eps of it and the best candidate has driven at most
        ``junction_hold_m`` past it. A dispatcher sees "at the junction" instead of a
        branch that may flip a second later.

        Why the second bound: where the candidates split long ago (a loop of service roads
        driven round, a wide junction whose branches meet again) the junction can be
        within eps of the fix yet far behind the vehicle along its path; a held answer
        there is stale (35-46 m behind the truth in the misses this was changed for, one
        of them on noise-free fixes). Why scores, not costs: the near-best set is taken
        with the same ranking that picks the best candidate (:meth:`_live_scores`); a
        margin in path cost around a candidate chosen by score holds at junctions the
        score has already decided.
        """
        tree = level.tree
        s = self.settings
        if split >= 0 and tree.driven_since(best, split, self.network.seg_len) <= s.junction_hold_m:
            seg = tree.seg_of(split)
            x, y = _point(self._view, seg, 1.0)
            if math.hypot(x - fix.x, y - fix.y) <= level.eps:
                return seg, 1.0, x, y
        return None

    def _stand_start(self, seq: int) -> tuple[int, int]:
        """Whether fix ``seq`` (the newest) stands: ``(stand, reach)``, ``(0, 0)`` if not.

        The vehicle stands now when the accepted fixes of the last ``STAND_HOLD_S``
        seconds all lie within ``STAND_SIGMAS`` x ``sigma_m`` of the newest one. The
        stand began at the oldest fix of that run when the fix before did not stand,
        else where the stand of the fix before began (``stand_seq``): the GNSS error
        wanders over a long stand, so a run counted back from the newest fix alone
        would begin ever later. Only fixes from the last committed one on are looked
        at (older positions may be gone; with ``smallest_agrees``, from the fix a
        deferred commit would have settled, :meth:`_live_from`): a stand that began
        before it begins, as far as this can tell, there.

        ``stand``: the first fix of the stand. ``reach``: a fix of the run (every fix
        from it to ``seq`` lies within the radius); :meth:`_run_start` finds from it
        where the run begins. Why not that start itself: stand_wait holds commits off
        during a stand, so the walk back to it grows with the stand (a fix each, on
        every fix); it stops once the run spans ``STAND_HOLD_S`` and ``STAND_KEEP_S``,
        and the start is looked for only when a held answer needs it
        (:meth:`_hold_at_stand`), or when a new stand begins there.

        Example (one fix: no stand yet; fixes 1 s apart within 1 m for 10 s: a stand
        from the first, the run known back to the fix 3 s before the newest):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1")
            >>> _ = tracker.update(Fix("v1", 0.0, 0.0, 0.0, 50.0, 1.0))
            >>> tracker._stand_start(1)
            (0, 0)
            >>> for i in range(1, 11):
            ...     _ = tracker.update(Fix("v1", float(i), 0.0, 0.0, 50.0 + i % 2, 1.0))
            >>> tracker._stand_start(11), tracker.stand_seq, tracker._run_start(11, 8)
            ((1, 8), 1, 1)
        """
        seq0 = self.fix_seq0
        row = seq - seq0
        lo = max(max(seq0, self._live_from() - 1), 1)
        if row >= self.fix_n or seq <= lo:
            return 0, 0
        xy = self.fix_xy
        x: float = xy.item(row, 0)
        y: float = xy.item(row, 1)
        radius = STAND_SIGMAS * self.settings.sigma_m
        r2 = radius * radius
        dx: float = xy.item(row - 1, 0) - x
        dy: float = xy.item(row - 1, 1) - y
        if dx * dx + dy * dy > r2:
            return 0, 0  # the run is the newest fix alone (a moving vehicle, usually)
        times = self.times
        t0 = self.times0  # fix k's time at times[k - t0]
        if not t0 <= lo < t0 + len(times):
            # the spike test moved the commit point back below the oldest time kept
            # (_spike_test): the whole run, whose start may have no time (no stand then)
            first = self._run_start(seq, seq - 1)
        else:
            # every fix from lo to seq has a time (times are kept for a contiguous run
            # of sequence numbers up to the newest): stop as soon as the run spans both
            # bounds, which then hold for the whole run too
            enough = times[seq - t0] - max(STAND_HOLD_S, STAND_KEEP_S)
            # back from the newest fix while within the radius (a moving vehicle leaves
            # it within a few fixes: scalar steps, no array built per fix)
            first = seq - 1
            while first > lo and times[first - t0] > enough:
                dx = xy.item(first - 1 - seq0, 0) - x
                dy = xy.item(first - 1 - seq0, 1) - y
                if dx * dx + dy * dy > r2:
                    break
                first -= 1
        t_first = self.fix_time(first)
        span = times[seq - t0] - t_first if t_first is not None else -1.0
        if self.stand_seq and span >= STAND_KEEP_S:
            return max(self.stand_seq, lo), first
        if span >= STAND_HOLD_S:
            first = self._run_start(seq, first)
            return first, first
        return 0, 0

    def _run_start(self, seq: int, reach: int) -> int:
        """The oldest fix of fix ``seq``'s run (see :meth:`_stand_start`), from ``reach`` on.

        The run: fixes back from ``seq`` that lie within ``STAND_SIGMAS`` x ``sigma_m`` of
        it, not older than the last committed fix; ``reach`` must be one of them.
        """
        seq0 = self.fix_seq0
        lo = max(seq0, self._live_from() - 1, 1)
        xy = self.fix_xy
        x = xy.item(seq - seq0, 0)
        y = xy.item(seq - seq0, 1)
        radius = STAND_SIGMAS * self.settings.sigma_m
        r2 = radius * radius
        first = reach
        while first > lo:
            dx = xy.item(first - 1 - seq0, 0) - x
            dy = xy.item(first - 1 - seq0, 1) - y
            if dx * dx + dy * dy > r2:
                break
            first -= 1
        return first

    def _hold_at_stand(
        self, level: Level, best: int, seq: int, recent: int
    ) -> tuple[int, float, float, float] | None:
        """The live answer while the vehicle stands: where the stand began, or None.

        While the vehicle stands (:meth:`_stand_start`), its GNSS error keeps wandering
        along the road, and the candidates follow it: the best one drifts past the
        stop onto road beyond it (at a turn-round, road the vehicle never drives; at a
        junction, a branch it may not take). The answer then stays at the point the
        best candidate's own path had reached at the first fix of the stand (its
        ancestor there, or at the last commit if the stand began before it), as long as
        every fix since that point (or since the certificate window began, if later)
        lies within eps of it; failing that, the same from where the newest fix's own
        run began (``recent``: a fix of that run, :meth:`_stand_start`'s ``reach``).

        The certificate still holds: the window's fixes up to the held point's fix lie
        within Fréchet distance eps of the path up to the held point (the sweep reached
        that point at that fix), and every later fix lies within eps of the point itself
        (checked here; the straight pieces between fixes then do too, a disc being
        convex), so the whole window lies within Fréchet distance eps of the path ending
        at the held point.
        """
        stand = self.stand_seq
        if stand:
            held = self._held_point(level, best, stand, seq)
            if held is not None:
                return held
        if recent:
            recent = self._run_start(seq, recent)
            if recent != stand:  # the same anchor gives the same answer
                return self._held_point(level, best, recent, seq)
        return None

    def _held_point(
        self, level: Level, best: int, anchor: int, seq: int
    ) -> tuple[int, float, float, float] | None:
        """The point of :meth:`_hold_at_stand` for a stand that began at fix ``anchor``.

        Whether the fixes from the held point's on lie within eps of it is remembered
        (``_held``, not serialised) for the fix it was asked at: asked again with the
        same point, from the same fix, at the next fix, only the newest fix is looked at
        (the older ones are the same positions; the spike test rewrites only the newest
        fix's position, and a fix that follows it has the same sequence number as the
        one asked, so it is looked at in full). During a long stand the full check
        would grow with it, on every fix.
        """
        tree = level.tree
        anc = tree.ancestor_at(best, anchor)
        seg, since, parent, via0, vias = tree.row_ints(anc)
        if parent >= 0 and self._cut_by_deferral(tree, parent):
            parent = -1  # smallest_agrees: the link the deferred commit would have cut
        view = self._view
        held = tree.point(view, anc)
        if (parent >= 0 and held[1] * view.slen[seg] <= self.settings.sigma_m
                and (vias or tree.seg_of(parent) != seg)):
            # the stand began just past a vertex: report that vertex, at the end of the
            # segment the path came in by (the branch beyond it is not yet known)
            seg_in = tree.via(via0 + vias - 1) if vias else tree.seg_of(parent)
            x, y = _point(view, seg_in, 1.0)
            held = (seg_in, 1.0, x, y)
        if level.cert_seq > since:
            since = level.cert_seq
        seq0 = self.fix_seq0
        if since < seq0 or since > seq:
            return None
        hx = held[2]
        hy = held[3]
        eps2 = level.eps * level.eps
        key = (since, hx, hy, eps2)
        memo = self._held
        known = memo.get(key) if memo is not None else None
        if known is not None and known[0] == seq - 1:
            ok = known[1]
            if ok:
                dx = self.fix_xy.item(seq - seq0, 0) - hx
                dy = self.fix_xy.item(seq - seq0, 1) - hy
                ok = not dx * dx + dy * dy > eps2
        else:
            # (every fix from since to seq within eps of the held point: one compiled
            # loop, not numpy's operations on a few rows)
            ok = _CALLS.all_within(self.fix_xy, since - seq0, seq - seq0 + 1, hx, hy, eps2)
        if memo is None or len(memo) >= _HELD_MEMO:
            memo = self._held = {}
        memo[key] = (seq, ok)
        return held if ok else None

    # ---------------------------------------------------------------- commits
    def _covering(self) -> list[Level]:
        """Live levels whose candidate tree covers the oldest uncommitted fix."""
        first = self.next_commit
        return [lv for lv in self.levels if lv.tree.hi > lv.tree.lo and lv.tree_seq <= first]

    def _settle(
        self, seq: int, t: float, dt: float, salvage: list[tuple[Level, CandidateTree]],
        events: list[Event], hold_newest: bool = False, tops: _Tops | None = None,
        stood: bool = False,
    ) -> None:
        """Commit what is settled. ``hold_newest``: not fix ``seq`` (the spike test may drop it).

        ``tops``: commit points the levels' steps answered (:meth:`_advance_levels`), used
        while the tree, ``next_commit`` and the newest fix are what they were asked for.
        """
        s = self.settings
        newest = seq - 1 if hold_newest else seq
        # the covering levels change only with a commit: asked again after each one
        # (this first time inline: _covering)
        first = self.next_commit
        covering = [lv for lv in self.levels if lv.tree.hi > lv.tree.lo and lv.tree_seq <= first]
        if not covering:
            # The trees that covered the oldest pending fixes died this step: their best
            # candidate is the final answer for them.
            for level, old in salvage:
                if level.tree_seq != seq:
                    continue
                leaf = old.best(self.last_seg)
                if s.smallest_commits:
                    leaf = self._smallest_top(level.eps, old, leaf)
                if leaf >= 0 and old.seq_of(leaf) >= self.next_commit:
                    self._commit_chain(old, leaf, events, prune=None)
                    covering = self._covering()
                    break
        waits: bool | None = None  # _into_stand(t, dt, stood), asked when a commit is due
        # with the cost beam (Tracker._beam) the covering levels after the first are
        # thinned: their candidates agree because states were dropped, which is no
        # evidence; only the first commits by agreement (nor do they defer to it); with
        # beam_top only the largest level is thinned, and only it is kept out
        # (and with beam_max_gap_s, only at a fix the beam thins after: one within
        # that gap of the previous accepted fix; after a longer gap, or at a first fix
        # (dt 0), as without it)
        thinned = self._beam_at(dt)
        progressed = True
        while progressed:
            progressed = False
            for level in covering:
                if thinned and level is not covering[0] \
                        and (level is self.levels[-1] or not s.beam_top):
                    break
                tree = level.tree
                # the common ancestor, back to the newest fix that may be committed
                known = tops.get(level) if tops else None
                if (known is not None and known[0] is tree and known[1] == self.next_commit
                        and known[2] == newest):
                    top = known[3]
                elif self.next_commit - 1 > level.cut:
                    # a commit moved the cut: the call also cuts the links _trim would
                    # (the same answer), so _trim makes no call for this level
                    # (CandidateTree.commit_point's compiled call, made here: a Python
                    # call fewer, up to three a commit)
                    top = _CALLS.cut_and_check(tree.ti, self.next_commit, newest, True)
                    level.cut = self.next_commit - 1
                else:
                    top = _CALLS.cut_and_check(tree.ti, self.next_commit, newest, False)
                if top < 0:
                    continue
                if s.start_roots and self._commit[2] < 0 \
                        and self._start_roots(level, dt):
                    # the tree now grows from another root: is a commit still due?
                    tree = level.tree
                    top = _CALLS.cut_and_check(tree.ti, self.next_commit, newest, False)
                    if top < 0:
                        continue
                # (both checks read no state a commit changes: the stand's once a fix,
                # first, as it needs no chain; the chain built once for the deferral
                # check and the commit)
                if waits is None:
                    waits = self._into_stand(t, dt, stood)
                if waits:
                    continue
                built = tree.chain(self._view, top, self.next_commit)
                if (hold_newest and s.start_way_out and self._commit[2] < 0
                        and self._way_out_pending(tree, built[0])):
                    break  # the log's first commit waits for the spike test (see there)
                if self._defers(level, top, covering, built):
                    continue
                if s.smallest_agrees and self._leaves_to_smaller(level, top, covering,
                                                                 newest, t):
                    # the commit it would have made bounds the live window (_live_from)
                    self.agreed_seq = max(self.agreed_seq, tree.seq_of(top))
                    continue
                self._commit_chain(tree, top, events, prune=None, built=built)
                covering = self._covering()
                progressed = True
                break
        lag_first = self._lag_from(seq, t)  # next_commit, unless smallest_agrees deferred
        if lag_first <= seq:
            too_many = seq - lag_first + 1 > s.max_lag_fixes
            i = lag_first - self.times0
            if i < 0:  # never: the fixes not committed keep their times (no wrap-around)
                raise KeyError(lag_first)
            too_old = t - self.times[i] > s.max_lag_s
            if too_many and not too_old and s.stand_wait and (
                    self._standing(seq, t) or self._into_stand(t)):
                too_many = False  # a stand: only the time bound forces (see _standing)
            if (too_many or too_old) and covering:
                level = covering[0]
                if s.start_roots and self._commit[2] < 0:
                    self._start_roots(level, dt)
                tree = level.tree
                keep = min(max(self._lag_target(seq, t), lag_first), newest)
                # fixes this dense: the best candidate by live score (see _live_scores)
                score = self._live_scores(level) if dt < SPARSE_S else None
                node = tree.ancestor_at(tree.best(self.last_seg, score), keep)
                if self.next_commit <= tree.seq_of(node) <= newest:
                    self._commit_chain(tree, node, events, prune=level)
                    covering = self._covering()
        if not covering:
            alive = [lv.tree_seq for lv in self.levels if len(lv.tree)]
            floor = min(alive) if alive else seq + 1
            if floor > self.next_commit:
                self.next_commit = floor  # fixes no tree covers any more stay unmatched
        # the times kept are those of a contiguous run of fixes up to the newest: drop
        # the ones before the oldest still needed downwards, not by a scan of them all
        times = self.times
        drop = self.next_commit - 1 - self.times0  # the times before fix next_commit - 1
        if drop > 0 and drop <= len(times):  # (the fixes from next_commit - 1 on stay)
            del times[:drop]
            self.times0 += drop
        self._trim(seq, t)

    def _smallest_top(self, eps: float, tree: CandidateTree, top: int) -> int:
        """``top`` taken back to before the fixes a smaller live level covers (-1: none left).

        Rule (``MatchSettings.smallest_commits``): when the trees that covered the oldest
        pending fixes died, :meth:`_settle` commits the best leaf ``top`` of such a dead
        ``tree`` (of the level of ``eps``): fixes ``next_commit`` .. its fix. A smaller
        level (a lower eps) whose tree is alive began after ``next_commit`` and covers
        the fixes from its ``tree_seq`` on; by the ladder's rule (each fix settled by the
        smallest level whose tree covers it) those are its to settle, and a dead tree
        covers nothing any more. So the salvage stops at the ancestor of ``top`` at the
        fix before the earliest such ``tree_seq``; if that lies before ``next_commit``,
        nothing is salvaged. Agreed commits of live levels are left as they are (tried:
        yielding there too loses stands that the older tree's chain holds whole,
        docs/measured.md "Session 16 (fleet5)").

        Example (one level: nothing to yield to, ``top`` as it is):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(eps_levels=(15.0,)))
            >>> level = tracker.levels[0]
            >>> tracker._smallest_top(level.eps, level.tree, 7)
            7
        """
        first = self.next_commit
        limit = min((lv.tree_seq for lv in self.levels
                     if lv.eps < eps and lv.tree.hi > lv.tree.lo and lv.tree_seq > first),
                    default=-1)
        if limit < 0:
            return top
        if tree.seq_of(top) < limit:
            return top
        row = tree.ancestor_at(top, limit - 1)
        return row if first <= tree.seq_of(row) <= limit - 1 else -1

    def _into_stand(self, t: float, dt: float = 0.0, stood: bool = False) -> bool:
        """Whether an agreed commit waits because the vehicle stood until lately.

        With ``stand_commit_wait`` (and ``stop_turns``, which keeps ``stood_t``, the last time
        the fixes had stood within ``STAND_SIGMAS`` x ``sigma_m`` for ``STAND_S``
        seconds), candidates that agree are not committed until ``STAND_AFTER_S``
        seconds after a stand: while the vehicle stands, the candidates may all descend
        from a state inside a short branch that the path comes back out of only when
        the vehicle leaves, and :meth:`_close_stand_loops` can cut such a loop out only
        when one commit holds the whole of it. Forced commits (``max_lag_*``) still go on.

        With ``sparse_stand_wait``, at more than ``gap_s`` between fixes (``dt``, the step
        into the newest fix, time ``t``), they also wait while that step or the step
        before it (``stood``, as :meth:`_accept` computed it for the bridge) was slower
        than ``STOOD_MPS``. Fixes 15-30 s apart show a stand as one or two slow steps, not
        as ``STAND_S`` of fixes followed by ``STAND_AFTER_S`` of moving ones, and the
        commit made at the fix leaving the stand ended inside the loop: the loop closes
        in that very step (the way back enters the stand vertex again).
        """
        s = self.settings
        if s.sparse_stand_wait and dt > s.gap_s and (
                stood or (self.speed is not None and self.speed < STOOD_MPS)):
            return True
        return s.stand_commit_wait and t - self._stood <= STAND_AFTER_S  # (False while NaN)

    def _turned_round(
        self, fix: Fix, prev: tuple[float, float, float] | None, dt: float
    ) -> bool:
        """Whether the fixes went back the way they came at the fix before ``fix``.

        For ``MatchSettings.reverse_turns``: the step ``prev`` -> ``fix`` is a gap (more
        than ``gap_s``) and it and the step into ``prev`` are both at least
        ``REVERSE_MIN_M`` long and turn by more than 135 degrees. Then the bridged step
        may turn round in the street, as one leaving a stop may (``stop_turns``). Why:
        a delivery van that dwells at a plain point of a road and leaves the way it came
        is seen at 15-30 s between fixes by one fix during the dwell or none, so no step
        is slow enough to say it stood; without the turn the bridge must take it on to
        the next junction or dead end and back, and the fix at the dwell is committed on
        road past the dwell point that the van never drove. The reversal of the fixes
        is the evidence the missing stand would have given. Then updates
        ``step_dir`` with this step.

        Example (east 100 m, then back west 80 m, 30 s apart; then on west):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (500.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(reverse_turns=True))
            >>> fixes = [Fix("v1", 30.0 * i, 0.0, 0.0, x, 0.0)
            ...          for i, x in enumerate((100.0, 200.0, 120.0, 40.0))]
            >>> [tracker._turned_round(f, (p.t, p.x, p.y) if p else None, 30.0)
            ...  for p, f in zip([None, *fixes], fixes)]
            [False, False, True, False]
        """
        came = self.step_dir
        self.step_dir = None
        if prev is None:
            return False
        chord = math.hypot(fix.x - prev[1], fix.y - prev[2])
        if chord < REVERSE_MIN_M:
            return False
        self.step_dir = _step_dir(prev, fix)
        return (came is not None and dt > self.settings.gap_s
                and math.cos(self.step_dir - came) < REVERSE_COS)

    def _lone_reversal(self, prev: tuple[float, float, float] | None) -> bool:
        """Whether the reversal of the fixes at ``prev`` is the first for a while.

        Asked once :meth:`_turned_round` said the fixes went back the way they came at
        ``prev``. With ``MatchSettings.lone_reverse_turns`` alone (``reverse_turns`` and
        ``reverse_turns_near`` off): true when the fixes did not reverse at any fix of
        the ``REVERSE_APART_S`` seconds before ``prev``; with either of the other two on
        (which open turns at every reversal) always true. Then records ``prev``'s time
        as the last reversal. Why: a van turns round in the street where it dwelt, at
        the end of a trip, minutes apart; fixes that reverse again within a few minutes
        are a vehicle circling or looping round blocks and dead ends, and for it a turn
        at the reversing fix is the cheaper route never driven (the random walk of
        bench/accuracy.py: docs/measured.md, "Session 12 (sparse30)").

        Example (reversals at 60, 180 and 400 s: the one 120 s after another is not lone):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (500.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(lone_reverse_turns=True))
            >>> [tracker._lone_reversal((t, 0.0, 0.0)) for t in (60.0, 180.0, 400.0)]
            [True, False, True]
        """
        s = self.settings
        if prev is None or not s.lone_reverse_turns:
            return True
        last, self.rev_t = self.rev_t, prev[0]
        return (s.reverse_turns or s.reverse_turns_near or last is None
                or prev[0] - last > REVERSE_APART_S)

    def _slow_reversal(self, came_speed: float | None) -> bool:
        """Whether the fixes went slowly enough round their reversal for a turn in the street.

        Asked once :meth:`_turned_round` and :meth:`_lone_reversal` said the fixes went back
        the way they came at the fix before the newest. With ``lone_reverse_turns`` alone
        (``reverse_turns`` and ``reverse_turns_near`` off): true when the mean of the
        speeds of the step into that fix (``came_speed``) and the step out of it
        (``speed``, just updated) is at most ``REVERSE_TURN_MPS``; with either of the
        other two on, always true. Why: a vehicle turning round in the street slows down
        or stops to turn, while a lone outlier fix makes the fixes reverse as well, with
        two long, fast steps; a turn opened at the outlier makes the path out to it and
        back cheap, and the spike test then keeps the outlier (on bench/accuracy.py's
        routed trips at 15 s, the rule's only lost fixes: docs/measured.md, "Session 13
        (sparse30b)"). The reversal still counts for :meth:`_lone_reversal`'s spacing.

        Example (a reversal at 4 m/s and one at 9 m/s):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (500.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(lone_reverse_turns=True))
            >>> tracker.speed = 5.0
            >>> tracker._slow_reversal(3.0), tracker._slow_reversal(13.0)
            (True, False)
        """
        s = self.settings
        if s.reverse_turns or s.reverse_turns_near or not s.lone_reverse_turns:
            return True
        if came_speed is None or self.speed is None:
            return False
        return (came_speed + self.speed) / 2.0 <= REVERSE_TURN_MPS

    def _said_segment(self, prev: tuple[float, float, float] | None) -> int:
        """The segment :meth:`_dead_end_ahead` searches on from for the fix ``prev``.

        ``last_seg`` (the best row's own segment), except with ``lone_reverse_turns``
        alone (``reverse_turns`` and ``reverse_turns_near`` off) when the newest live
        answer (``said``, kept with ``hold_filtered``) is ``prev``'s: then that answer's
        segment. The two differ where the answer is held at a junction
        (``junction_hold``: the candidates split there, the branch taken is not known,
        so the answer stays at the end of the road they came in by) or reported there
        (``vertex_in_segment``: the best row at the very start of its segment). Searched
        on from the best row's own segment, the dead-end check sees only the branch that
        row happens to lie on; searched on from the answer at the junction, it sees
        every way on from there but back, as the vehicle could have taken any. Why: on
        bench/accuracy.py's random walk (test extract, seed 31, 30 s, drive sim-058)
        the walk went into a 50 m dead-end spur and back between two fixes, the
        reversing fix's best row lay just past the start of another road leaving that
        junction while its answer was held at the junction, and the turn the rule
        opened on that road added 17.5 m never driven (docs/measured.md, "Session 13
        (spur058)").
        """
        s = self.settings
        said = self.said
        if (prev is None or said is None or not s.lone_reverse_turns
                or s.reverse_turns or s.reverse_turns_near):
            return self.last_seg
        said_t, seg = _SAID.unpack(said)[:2]
        return int(seg) if said_t == prev[0] else self.last_seg

    def _logged_step_dir(self) -> float | None:
        """``step_dir`` as the last two accepted fixes in the fix log give it, or None.

        For a state that does not hold it (written before ``reverse_turns``, or with it
        off): the direction of the step between the last two accepted fixes when it is
        at least ``REVERSE_MIN_M`` long, as :meth:`_turned_round` sets it. The log keeps
        the fixes from the oldest pending one on (a dropped spike's row is overwritten by
        the fix after it), so the two are there while a fix before the newest is
        pending; otherwise None (unknown: the next step sets it afresh).
        """
        n = self.fix_n
        if n < 2 or self.fix_seq0 + n - 1 != self.seq or self.last is None:
            return None
        (x0, y0), (x1, y1) = self.fix_xy[n - 2].tolist(), self.fix_xy[n - 1].tolist()
        if math.hypot(x1 - x0, y1 - y0) < REVERSE_MIN_M:
            return None
        return math.atan2(y1 - y0, x1 - x0)

    def _dead_end_ahead(
        self, fix: Fix, prev: tuple[float, float, float] | None, dt: float,
        came_speed: float | None,
    ) -> bool:
        """Whether a dead end ahead of the fix before ``fix`` explains its reversal.

        For ``MatchSettings.reverse_turns``, asked once :meth:`_turned_round` said the
        fixes went back at ``prev``. From ``prev``'s position on its live answer's
        segment (:meth:`_said_segment`), heading on without turning back, is there a dead end the
        vehicle could have driven to and back from in the step: within half of the route
        it could have driven in ``dt`` (at ``REVERSE_PACE`` times ``came_speed``, the pace
        of the step into ``prev``, and at least ``REVERSE_FLOOR_MPS``) less the step's
        chord? Then the reversal is taken for the dead end's own turn, which the network
        already allows, and no turn in the street is opened. Why: a vehicle that drives
        into a dead end and back between two fixes reverses its fixes as a van turning
        at a dwell does, and a turn in the street short of the end is then the cheaper
        route (the route term charges the length it saves) though the vehicle drove to
        the end: on the random walk of bench/accuracy.py the rule without this check
        cost up to 0.8 points of route mismatch at 30 s (docs/measured.md, "Session 10
        (sparse30)"). A van that dwelt at a plain point of a road further from a dead
        end than that keeps its turn in the street.
        """
        seg = self._said_segment(prev)
        if prev is None or came_speed is None or seg < 0:
            return False
        chord = math.hypot(fix.x - prev[1], fix.y - prev[2])
        reach = (max(REVERSE_PACE * came_speed, REVERSE_FLOOR_MPS) * dt - chord) / 2.0
        if reach <= 0.0:
            return False
        view = self._view
        a, b = view.sf[seg], view.st[seg]
        ax, ay = view.vx[a], view.vy[a]
        dx, dy = view.vx[b] - ax, view.vy[b] - ay
        d2 = dx * dx + dy * dy
        u = 0.0 if d2 <= 0.0 else ((prev[1] - ax) * dx + (prev[2] - ay) * dy) / d2
        left = (1.0 - min(1.0, max(0.0, u))) * view.slen[seg]
        # a search by route length from there, no turning back (bounded: a few
        # segments within reach in a street grid)
        heap = [(left, seg)]
        seen = {seg}
        while heap:
            dist, here = heapq.heappop(heap)
            if dist > reach:
                return False
            back = view.twin[here]
            on = [o for o in view.out[view.st[here]] if o != back]
            if not on:
                return True  # a dead end (or a one-way's end) within reach
            for o in on:
                if o not in seen and len(seen) < REVERSE_SEARCH:
                    seen.add(o)
                    heapq.heappush(heap, (dist + view.slen[o], o))
        return False

    def _stood_lately(self, fix: Fix, prev_t: float | None) -> bool:
        """Whether the vehicle stood still until at most ``STAND_AFTER_S`` before ``prev_t``.

        The evidence of a stand for ``MatchSettings.stop_turns`` beyond the last step's
        speed: a run of accepted fixes spanning at least ``STAND_S`` seconds, all within
        ``STAND_SIGMAS`` x ``sigma_m`` of the run's first fix, that went on until at most
        ``STAND_AFTER_S`` seconds before the fix before ``fix`` (time ``prev_t``). Why: at
        1-5 s between fixes a vehicle that stood and leaves the way it came is moving again when its
        smallest level dies (a few seconds after it set off), so the speed of the last
        step says nothing of the stand; the run does. Kept in two scalars
        (``stand_from``, ``stood_t``, serialised) because the fixes of a stand may be
        committed, and their times dropped, before the vehicle sets off. Then updates
        them with ``fix``.

        Example (fixes 1 s apart within 1 m for 11 s, then at 10 m/s: a stand from the
        fix at 10 s, answered from the step after it until 10 s after the stand):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (500.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(stop_turns=True))
            >>> xs = [50.0 + i % 2 for i in range(12)] + [65.0 + 10 * i for i in range(14)]
            >>> [tracker._stood_lately(Fix("v1", float(t), 0.0, 0.0, x, 1.0),
            ...                        float(t - 1) if t else None)
            ...  for t, x in enumerate(xs)][9:]  # doctest: +NORMALIZE_WHITESPACE
            [False, False, True, True, True, True, True, True, True, True, True, True, True,
             True, False, False, False]
        """
        stood = prev_t is not None and prev_t - self._stood <= STAND_AFTER_S  # (NaN: False)
        anchor = self._stand
        if math.isnan(anchor[0]) or math.hypot(fix.x - anchor[1], fix.y - anchor[2]) > (
                STAND_SIGMAS * self.settings.sigma_m):
            self._stand = anchor = (fix.t, fix.x, fix.y)
        if fix.t - anchor[0] >= STAND_S:
            self._stood = fix.t
        return stood

    def _standing(self, seq: int, t: float) -> bool:
        """Whether the vehicle stood still for ``STAND_S`` seconds, ending just before fix ``seq``.

        Evidence: a run of accepted fixes spanning at least ``STAND_S`` seconds that all
        lie within ``STAND_SIGMAS`` x ``sigma_m`` of the run's last fix (within GNSS noise
        of each other), the run ending at most ``STAND_AFTER_S`` seconds before fix
        ``seq`` (time ``t``). Read by the forced commit
        (``max_lag_fixes``, with ``MatchSettings.stand_wait``): while a vehicle stands,
        its GNSS error wanders along the road and the candidates that followed it
        across a vertex score as well as the one that stayed; a commit forced then picks
        one of them and drops the others, and when the vehicle leaves the way it came,
        the stand is committed on road it never drove. Left open until the vehicle has
        moved off, the candidates that cannot be continued die and an ordinary commit
        settles the stand. The time bound (``max_lag_s``) still forces, so a parked
        vehicle's state stays bounded.

        Example (one fix: no evidence yet; 11 fixes 1 s apart within 1 m: stood):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1")
            >>> _ = tracker.update(Fix("v1", 0.0, 0.0, 0.0, 50.0, 1.0))
            >>> tracker._standing(1, 0.0)
            False
            >>> for i in range(1, 11):
            ...     _ = tracker.update(Fix("v1", float(i), 0.0, 0.0, 50.0 + i % 2, 1.0))
            >>> tracker._standing(11, 10.0), tracker._standing(11, 25.0)
            (True, False)
        """
        radius = STAND_SIGMAS * self.settings.sigma_m
        times = self.times
        t0 = self.times0  # fix k's time at times[k - t0] while 0 <= k - t0 < n_t
        n_t = len(times)
        xy = self.fix_xy
        seq0 = self.fix_seq0
        end = seq
        while end - seq0 < self.fix_n and end - seq0 > 0:
            te = times[end - t0] if 0 <= end - t0 < n_t else None
            if te is None or t - te > STAND_AFTER_S:
                return False
            x, y = xy[end - seq0]
            k = end - 1
            while k >= seq0:
                tk = times[k - t0] if 0 <= k - t0 < n_t else None
                if tk is None or math.hypot(xy[k - seq0, 0] - x, xy[k - seq0, 1] - y) > radius:
                    break
                if te - tk >= STAND_S:
                    return True
                k -= 1
            end -= 1
        return False

    def _defers(self, level: Level, row: int, covering: list[Level],
                built: tuple[list[Node], Node | None] | None = None) -> bool:
        """Whether ``level`` leaves the commit up to row ``row`` to another covering level.

        It does when another covering level's tree is at least as old (it went on where
        this one started afresh, or alongside it), and this level's path up to ``row``
        neither continues the last committed point nor can be joined to it
        (:meth:`_join_limit`): committed, it would break the path, where the other tree's
        candidates may still continue it once they agree. Why: at 1 s a small level that
        lost the road for a second often restarts on a parallel road for one to three
        fixes and commits them at once (one candidate); such a stretch breaks the path at
        both ends and adds a road never driven. Less often two levels whose candidates
        agree at different moments commit alternately on two neighbouring roads. A forced
        commit (``max_lag_*``) still goes to the smallest covering level: deferring it too
        (to an older, larger level) changed no figure on the tuning drives (three seeds,
        both extracts, 1 / 5 / 15 / 30 s).

        Example (no commit yet: nothing to break):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1")
            >>> tracker._defers(tracker.levels[0], 0, tracker.levels)
            False
        """
        last = self.last_commit
        if last is None:
            return False
        own = level.tree_seq
        for lv in covering:
            if lv is not level and lv.tree_seq <= own:
                break
        else:
            return False
        tree = level.tree
        if built is not None:
            # the chain the commit will use (``tree.chain(view, row, next_commit)``): its
            # node before is the state just before the stretch
            chain, node = built
            if node is not None and node.seq == last[2] and node.seg == last[0]:
                return False
        else:
            # the state just before the stretch (a compiled walk; no nodes built for
            # the usual case, a stretch that goes on from the last committed state)
            before = tree.ancestor_at(row, self.next_commit - 1)
            if tree.seq_of(before) == last[2] and tree.seg_of(before) == last[0]:
                return False
            chain, _ = tree.chain(self._view, row, self.next_commit)
        if not chain:
            return False
        first = chain[0]
        return connect(self._view, last[0], last[1], first.seg, first.pos,
                       self._join_limit(first.t - last[3])) is None

    def _leaves_to_smaller(self, level: Level, top: int, covering: list[Level],
                           newest: int = 0, t: float = 0.0) -> bool:
        """Rule ``smallest_agrees``: whether ``level``, agreed up to row ``top``, leaves the commit.

        Asked by :meth:`_settle` only where ``level`` would otherwise commit (its
        candidates agree and :meth:`_defers` lets it). It does when a smaller covering
        level (a lower eps) has a tree that began before the last committed fix, the
        fixes from the last committed one to ``top``'s are at most ``SPARSE_S`` apart,
        and the fixes not committed (to ``newest``, the newest one at time ``t``) are
        within the lag (``max_lag_fixes``, ``max_lag_s``). The smaller level then
        commits when its own candidates agree, or by a forced commit (counted from
        ``agreed_seq``: :meth:`_lag_from`). Past the lag the larger level commits as it
        would without the rule.

        Why: at 1 s, after a turn round at a dead end, a 30 m tree left with one
        candidate (a lineage that never turned, held at its lowest reachable point on
        the way in) agrees with itself at once and settles the fixes 8-29 m from them,
        where the 15 m level's candidates still follow the fixes (docs/measured.md
        "Session 19 (fleet1hz)"). The bounds keep it to where it
        helped: a smaller tree that began since the last commit (it restarted: it lost
        the road) is no better judge than the larger one; at 15-30 s between fixes every
        step is bridged, the larger level's one candidate is no lineage that lost a
        turn, and the unbounded rule lost final answers there; and a deferral held
        through a long stand left fixes unmatched once the trees covering them were
        force-pruned (a first build without the lag bound: docs/measured.md "Session 21
        (agrees5)").

        Example (one level: no smaller level to leave it to):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(eps_levels=(15.0,)))
            >>> level = tracker.levels[0]
            >>> tracker._leaves_to_smaller(level, 0, [level])
            False
        """
        last = self.last_commit
        if last is None or not any(lv.eps < level.eps and lv.tree_seq < last[2]
                                   for lv in covering if lv is not level):
            return False
        if self._beyond_lag(newest, t, 1):
            return False
        times = self.times
        t0 = self.times0
        k = max(self.next_commit - 1, t0)
        end = min(level.tree.seq_of(top), t0 + len(times) - 1)
        while k < end:
            if times[k + 1 - t0] - times[k - t0] > SPARSE_S:
                return False
            k += 1
        return True

    def _live_from(self) -> int:
        """The oldest fix not settled, as the live answer reads it.

        ``next_commit``, or the fix after ``agreed_seq`` when ``smallest_agrees``
        deferred a commit up to there.

        A deferred commit leaves the smaller level's tree as it was; read from here, the
        live score and the stand checks see the window the commit would have left them,
        so that the rule changes final answers, not live ones.
        """
        return self.agreed_seq + 1 if self.agreed_seq >= self.next_commit else self.next_commit

    def _lag_from(self, seq: int, t: float) -> int:
        """The first fix a forced commit's lag counts from: :meth:`_live_from`, within bounds.

        With a commit deferred by ``smallest_agrees``, the lag (``max_lag_*``) counts from
        the fix after the agreed one, as it would had the commit been made, so that no
        forced commit prunes the smaller level's tree sooner than it would have; but
        never more than twice the lag behind the oldest fix not committed, so the state
        stays bounded.
        """
        first = self.next_commit
        if self.agreed_seq < first or self._beyond_lag(seq, t, 2):
            return first
        return self.agreed_seq + 1

    def _beyond_lag(self, seq: int, t: float, times_lag: int) -> bool:
        """Whether the fixes not committed, to ``seq`` at ``t``, exceed ``times_lag`` lags.

        The lag is ``max_lag_fixes`` fixes or ``max_lag_s`` seconds; ``smallest_agrees``
        bounds its deferrals by it (:meth:`_leaves_to_smaller` at once, :meth:`_lag_from`
        at twice).
        """
        s = self.settings
        first = self.next_commit
        i = first - self.times0
        return (seq - first + 1 > times_lag * s.max_lag_fixes
                or (0 <= i < len(self.times)
                    and t - self.times[i] > times_lag * s.max_lag_s))

    def _cut_by_deferral(self, tree: CandidateTree, row: int) -> bool:
        """Whether a commit deferred by ``smallest_agrees`` would have cut the link to ``row``.

        It would where ``row``'s fix is older than the agreed one; the live answer reads
        such a link as cut, as it would after that commit.
        """
        return self.agreed_seq >= self.next_commit and tree.seq_of(row) < self.agreed_seq

    def _lag_target(self, seq: int, t: float) -> int:
        """Newest fix a forced commit may reach: half the lag behind the newest fix."""
        s = self.settings
        target = seq - s.max_lag_fixes // 2
        half = t - s.max_lag_s / 2.0
        for k in range(self.next_commit, seq + 1):
            i = k - self.times0
            if (self.times[i] if 0 <= i < len(self.times) else t) > half:
                target = min(target, k - 1)
                break
        return max(target, self.next_commit)

    def _commit_chain(
        self, tree: CandidateTree, row: int, events: list[Event], prune: Level | None,
        settle_all: bool = False, built: tuple[list[Node], Node | None] | None = None,
    ) -> None:
        """Commit the path ending at row ``row`` for every fix from ``next_commit`` on.

        ``built``: ``tree.chain(view, row, next_commit)`` if the caller has it already.
        """
        chain, before = built if built is not None else tree.chain(self._view, row,
                                                                     self.next_commit)
        if not chain:
            return
        eps = self._eps_of(tree)  # (the stand rules' radius: looked up once a commit)
        if self.settings.stand_loops and before is not None and len(chain) >= 2:
            chain = self._close_stand_loops(chain, before, eps)
        if self.settings.stand_turnback and before is not None and len(chain) >= 3:
            chain = self._turn_back_at_stand(chain, before, eps)
        if self.settings.stand_way_out and before is not None and len(chain) >= 2:
            chain = self._way_out_of_stand(chain, before, eps)
        top = chain[-1]
        view = self._view
        first = chain[0]
        path: list[int] = []
        last = self.last_commit
        starts = last is None  # a new stretch: nothing committed before it joins on
        laps = self.settings.speed_laps and self.lap_v is not None
        if laps and not (before is not None and last is not None and before.seq == last[2]
                         and before.seg == last[0]):
            self.lap_due = 0.0  # a new stretch or a join: the sum starts afresh
        goes_on = False  # the path goes on from the state before the chain
        if last is None:
            path.append(first.seg)
        elif before is not None and before.seq == last[2] and before.seg == last[0]:
            path.extend(_steps(last[0], first))
            goes_on = True
        elif (self.settings.start_way_out and not laps and before is not None
                and before.seq == last[2] and last[1] == 0.0 and before.pos < 1.0
                and _steps(before.seg, first)[:1] == [last[0]]):
            # start_way_out reported the log's first fix at V on B (the path has A, B);
            # this chain goes on from that fix's node on A through B, as it was built
            path.extend(_steps(before.seg, first)[1:])
            goes_on = True
        else:
            route = connect(view, last[0], last[1], first.seg, first.pos,
                            self._join_limit_to(last, first))
            if route is None and self.settings.break_rejoin and before is not None \
                    and before.seq == last[2]:
                # no join: go on from this tree's own answer for the last committed fix
                path.extend(_steps(before.seg, first) or [first.seg])
            elif route is None:
                starts = True
                path.append(first.seg)  # a break: the vehicle left the network or jumped
            else:
                path.extend(route)
                if route or first.seg != last[0]:
                    path.append(first.seg)
        for a, b in itertools.pairwise(chain):
            path.extend(_steps(a.seg, b))
        if laps:
            links = [before, *chain] if goes_on and before is not None else chain
            pieces = [_steps(a.seg, b) for a, b in itertools.pairwise(links)]
            path[len(path) - sum(map(len, pieces)):] = self._with_laps(links, pieces)
        if self.settings.stub_turn_m > 0.0:
            self._stub_turns_into(path, chain, before, eps)
        fixes = [MatchedFix(n.t, n.seg, n.pos * view.slen[n.seg], n.x, n.y) for n in chain]
        if self.settings.vertex_in_segment:
            # an answer at the very start of a segment: at the end of the segment the
            # path came in by (the same point; see _came_in_by)
            prev = before
            for k, n in enumerate(chain):
                if n.pos <= 0.0 and (k or goes_on):
                    seg_in = n.via[-1] if n.via else (
                        prev.seg if prev is not None and prev.seg != n.seg else -1)
                    if seg_in >= 0:
                        fixes[k] = MatchedFix(n.t, seg_in, float(view.slen[seg_in]), n.x, n.y)
                prev = n
        if self.settings.stand_at_vertex and (goes_on or len(chain) >= 2):
            self._stand_at_vertex(chain, before, goes_on, starts, eps, fixes)
        if settle_all and self.settings.end_stand and len(chain) >= 2:
            self._end_stand(chain, before, eps, fixes)
        if settle_all and self.settings.end_at_vertex:
            self._end_at_vertex(chain, before if goes_on else None, eps, fixes)
        began = (self.settings.start_stand and last is None and len(chain) >= 3
                 and self._start_stand(chain, eps, fixes, path))
        if starts and first.pos >= 1.0 and not began:
            # A stretch that starts at the very end of a segment drives none of it: report
            # its first fix at the start of the segment entered next (the same point) and
            # begin the path there, so that the path claims no segment it never drove.
            entered = self._entered_after(tree, chain)
            if entered >= 0:
                fixes[0] = MatchedFix(first.t, entered, 0.0, first.x, first.y)
                path[0] = entered
                if path[1:2] == [entered]:
                    del path[0]
                if len(chain) == 1:
                    top = Node(entered, first.seq, first.t, 0.0, first.x, first.y,
                               first.parent, (), first.cost, 0.0)
        elif (self.settings.start_way_out and last is None and not began
                and first.pos < 1.0):
            entered = self._start_way_out(tree, chain, eps)
            if entered >= 0:
                # the answer only: the path keeps A (see _start_way_out)
                v = view.sf[entered]
                fixes[0] = MatchedFix(first.t, entered, 0.0, view.vx[v], view.vy[v])
                if len(chain) == 1:
                    path.append(entered)
                    top = Node(entered, first.seq, first.t, 0.0, view.vx[v], view.vy[v],
                               first.parent, (), first.cost, 0.0)
        if self.settings.monotone_final:
            fixes = self._monotone_final(fixes, path, starts)
        if self.skipped:
            fixes = self._fill_skipped(chain, before, math.inf if settle_all else top.t, fixes)
        events.append(Commit(self.vehicle, tuple(fixes), tuple(path)))
        self.next_commit = top.seq + 1
        self._commit = (top.seg, top.pos, top.seq, top.t)
        if self.lap_v:
            # the speeds a later commit can still read: from the fix committed last on
            self.lap_v = {t: v for t, v in self.lap_v.items() if t >= top.t}
        if prune is not None:
            prune.tree.prune(row)

    def _start_roots(self, level: Level, dt: float) -> bool:
        """Before the log's first commit: rebuild ``level``'s tree from its best root alone.

        Rule (``MatchSettings.start_roots``; only while nothing is committed, asked
        when a commit of ``level`` is due; ``dt``: the last step, s):
        :func:`livematch.core.startroots.best_root` sweeps the tree's fixes again
        from each segment within eps of the first fix alone; when the root of the
        best live candidate does not reach the newest fix that way (the tree bridged)
        but others do (fixes less than ``SPARSE_S`` apart, median), they are ranked
        by the forced commit's rule at such fixes (live score, over each root's live
        states), and the level's tree becomes the winner's states and their paths;
        the commit is decided on it. Why: the sweep keeps one state per segment and
        settles a vertex from the entry that reaches it first, so where a log begins
        beside a parallel road every candidate can descend from the other road's
        root by the time they agree, and that lineage may need a bridge where the
        road driven, swept alone, stays within eps (docs/measured.md, "Session 15
        (logstart)" and "Session 16 (movestart)").
        Returns whether the tree was rebuilt.
        """
        tree = level.tree
        if level.tree_seq != self.next_commit or tree.hi <= tree.lo:
            return False  # the tree did not start at the oldest fix not committed
        if level.cert_seq <= level.tree_seq:
            # the tree never bridged: its best candidate is a chain of sweep steps from
            # its root to the newest fix, and what a sweep step reaches from a state
            # does not depend on which parent the state keeps, so that root swept alone
            # reaches the newest fix too and the replay would change nothing. Skipping
            # it keeps the rule's cost to trees that bridged: asked at every fix while
            # the first commit is due and deferred, the replay of every root made whole
            # logs 1.6x slower (docs/measured.md, "Session 16 (lead)")
            return False
        scores = self._live_scores(level) if dt < SPARSE_S else None
        chain, before = tree.chain(self._view, tree.best(self.last_seg, scores),
                                   self.next_commit)
        if before is not None or not chain or chain[0].seq != level.tree_seq:
            return False
        fixes = [(n.seq, n.t, *self._fix_xy_of(n)) for n in chain]
        live = best_root(self.network, self.settings, level.eps, chain[0].seg, fixes,
                         SPARSE_S)
        if live is None:
            return False
        level.tree = CandidateTree.from_nodes(live)
        level.cut = -1
        return True

    def _end_stand(self, chain: list[Node], before: Node | None, eps: float,
                   fixes: list[MatchedFix]) -> None:
        """Report a stand at the end of ``chain`` on the segment it began on, in ``fixes``.

        Rule (``MatchSettings.end_stand``; the end-of-log flush only): the stand is the
        longest run of ``chain``'s last nodes whose fixes lie within ``STAND_SIGMAS`` x
        ``sigma_m`` of the last fix, reaching back to ``before`` (the last committed
        node, already published) when every node of the chain stands and its fix does
        too; it must span at least ``STAND_S`` seconds, and its fixes, from its first
        node A on, must come densely and wander (:meth:`_wandering_run`: median gap at
        most ``SPARSE_S``, median step at least ``STILL_M``). A is where the path was
        when the vehicle stopped (as far as this commit can tell). Every later node on
        another segment is reported on A's segment: at the point of that segment
        nearest its fix, never behind A or the node before it. If one such point lies
        farther than ``eps`` from its fix nothing changes (the fixes do not stand at
        A's segment). Only the reported answers change: the committed path, the chain
        and the last commit point stay as they were (as :meth:`_stand_at_vertex` does).
        An answer another rule has placed off its node's segment (``stand_at_vertex``
        at a vertex, ``vertex_in_segment`` at the end of the segment in) is kept, and
        where A's own answer was so placed nothing changes: that rule has already
        reported where the stand began (a stand at a vertex between two short segments
        whose fixes wander over both: moving the later fixes onto A's segment would
        undo that answer, the one fix the rule lost on the decision runs before this
        guard).

        Why: while a vehicle stands its GNSS error leans one way for tens of seconds
        (temporally correlated error), and the best path follows it past the vertex
        ahead onto a road the vehicle never drove (the "road out of V" misses of
        bench/fleetmiss.py). In the middle of a log the fixes after the stand show which
        way the vehicle left, and :meth:`_stand_at_vertex` reads them; at the end of the
        log there are none, and fixes that stand show no movement off A's segment.
        Dense fixes: at 15 or 30 s between fixes a run of ``STAND_S`` is two fixes, and
        two fixes within ``STAND_SIGMAS`` x ``sigma_m`` of each other 15-30 s apart are
        as often a vehicle going round a small loop or a turning circle as a stand
        (docs/measured.md "Session 14 (endstand2)": the only fixes the rule lost); with
        ``end_stand_sparse`` such a stand counts when the committed path's own route over
        it is short (:meth:`_short_sparse_stand`: the path went round no loop). The
        path is kept because the truth of a vehicle standing at the vertex V at the end
        of A's segment is the next segment at offset 0: a path that went on onto it
        covered that truth, a path cut back to A's segment does not.

        Example (a stand whose fixes drift 6 m past the end of a road onto the next):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1),
            ...                           Road([(100.0, 0.0), (100.0, 80.0)], way=2)])
            >>> tracker = Tracker(net, "v1", MatchSettings(end_stand=True))
            >>> chain = []
            >>> for i in range(12):
            ...     x, y = (98.0 + 0.2 * i, 0.0) if i < 6 else (100.0, 0.5 * i)
            ...     _ = tracker.update(Fix("v1", float(i), 0.0, 0.0, x, y))
            ...     seg = 0 if i < 6 else 2
            ...     pos = x / 100.0 if i < 6 else y / 80.0
            ...     chain.append(Node(seg, tracker.fix_seq0 + i, float(i), pos, x, y,
            ...                       chain[-1] if chain else None, (), 0.0, 0.0))
            >>> out = [MatchedFix(n.t, n.seg, n.pos * 80.0, n.x, n.y) for n in chain]
            >>> tracker._end_stand(chain, None, 15.0, out)
            >>> [(f.segment, round(f.offset_m, 3)) for f in out][-2:]
            [(0, 100.0), (0, 100.0)]
        """
        seq0 = self.fix_seq0
        xy = self.fix_xy
        n = len(chain)
        r = chain[-1].seq - seq0
        if not 0 <= r < self.fix_n:
            return
        lx, ly = xy.item(r, 0), xy.item(r, 1)
        radius2 = (STAND_SIGMAS * self.settings.sigma_m) ** 2
        s = n - 1
        while s > 0:
            r = chain[s - 1].seq - seq0
            if not 0 <= r < self.fix_n:
                break
            dx, dy = xy.item(r, 0) - lx, xy.item(r, 1) - ly
            if dx * dx + dy * dy > radius2:
                break
            s -= 1
        if self.settings.end_stand_centre and s > 0:
            s = self._stand_from_centre(chain, s)
        anchor = chain[s]
        if s == 0 and before is not None:
            r = before.seq - seq0
            if 0 <= r < self.fix_n:
                dx, dy = xy.item(r, 0) - lx, xy.item(r, 1) - ly
                if dx * dx + dy * dy <= radius2:
                    anchor = before
                    s = -1
        seg = anchor.seg
        run = [anchor, *chain[s + 1:]]
        if (chain[-1].t - anchor.t < STAND_S or all(c.seg == seg for c in chain[s + 1:])
                or (s >= 0 and fixes[s].segment != seg)
                or not (self._wandering_run(run) or self._short_sparse_stand(run))):
            return
        view = self._view
        ax, ay = view.vx[view.sf[seg]], view.vy[view.sf[seg]]
        ux, uy = view.vx[view.st[seg]] - ax, view.vy[view.st[seg]] - ay
        length2 = ux * ux + uy * uy
        slen = float(view.slen[seg])
        moved: list[tuple[int, MatchedFix]] = []
        pos = anchor.pos
        for k in range(s + 1, n):
            node = chain[k]
            if node.seg == seg and node.pos >= pos and not node.via:
                pos = node.pos
                continue
            r = node.seq - seq0
            fx, fy = xy.item(r, 0), xy.item(r, 1)
            pos, px, py = _slide(fx, fy, ax, ay, ux, uy, length2, pos, ahead=True)
            if (px - fx) ** 2 + (py - fy) ** 2 > eps * eps:
                return
            if fixes[k].segment == node.seg:
                moved.append((k, MatchedFix(node.t, seg, pos * slen, float(px), float(py))))
        for k, answer in moved:
            fixes[k] = answer

    def _end_at_vertex(self, chain: list[Node], before: Node | None, eps: float,
                       fixes: list[MatchedFix]) -> None:
        """Report the log's last fixes matched just past a vertex at the vertex (sparse).

        Rule (``MatchSettings.end_at_vertex``; the end-of-log flush only): the run is
        the chain's last nodes on one segment S, from the node that entered S on (its
        ``via`` ends with the segment P it came in by, or the node before it, or
        ``before`` when the chain goes on from the last commit, lies on P). P must end
        where S starts, at a vertex V, and not be S's twin (a turn round at V: P is then
        a road the vehicle drove away from). Every node of the run must be matched in
        the half of S nearer V and have its fix within ``eps`` of V, and its answer
        must still be on its node's segment or at V on P (no other rule placed it). The fixes
        from the one before the run to the last must come more than ``SPARSE_S`` apart
        (median gap), and a run of one node needs the fix before it within ``eps`` of V
        too: the vehicle stood at V for one gap at least (one fix near V is also what a
        vehicle driving through V onto S sends, and then the road in P, which the path
        may have guessed between two sparse fixes, is no better than S: the random
        walk's two lost fixes on the decision runs). Then the run's fixes are reported
        at V as the end of P. The
        committed path, the chain and the last commit point stay as they were.

        Why: at 15-30 s between fixes a vehicle that reaches V and stands or turns round
        there when the log ends leaves one or two last fixes near V, which the GNSS error
        leans a few metres onto one of V's roads out, and the best path follows them;
        in the middle of a log the next fixes show the road out, at the end there are
        none. P is on the driven path whether the vehicle then stood at V or drove on
        into S (the path, which goes on into S, is kept for that case). Dense fixes are
        left to :meth:`_end_stand` and :meth:`_stand_at_vertex`, which see the stand.
        The certificate holds: each fix of the run lies within eps of V, where it is
        reported, and the path runs through V.

        Example (a last fix 3 m past the corner, 30 s after one 4 m short of it):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1),
            ...                           Road([(100.0, 0.0), (100.0, 80.0)], way=2)])
            >>> tracker = Tracker(net, "v1", MatchSettings(end_at_vertex=True))
            >>> for i, (x, y) in enumerate([(96.0, 0.0), (100.0, 3.0)]):
            ...     _ = tracker.update(Fix("v1", 30.0 * i, 0.0, 0.0, x, y))
            >>> a = Node(0, tracker.fix_seq0, 0.0, 0.96, 96.0, 0.0, None, (), 0.0, 0.0)
            >>> b = Node(2, tracker.fix_seq0 + 1, 30.0, 3.0 / 80.0, 100.0, 3.0, a, (), 0.0, 0.0)
            >>> out = [MatchedFix(0.0, 0, 40.0, 40.0, 0.0), MatchedFix(30.0, 2, 3.0, 100.0, 3.0)]
            >>> tracker._end_at_vertex([a, b], None, 15.0, out)
            >>> (out[1].segment, out[1].offset_m)
            (0, 100.0)
        """
        view = self._view
        n = len(chain)
        seg = chain[-1].seg
        k = n - 1
        while k > 0 and not chain[k].via and chain[k - 1].seg == seg:
            k -= 1
        prev = chain[k - 1] if k else before
        seg_in = chain[k].via[-1] if chain[k].via else (
            prev.seg if prev is not None and prev.seg != seg else -1)
        if seg_in < 0 or prev is None or view.st[seg_in] != view.sf[seg] \
                or seg_in == view.twin[seg]:
            return
        seq0 = self.fix_seq0
        xy = self.fix_xy
        times = [prev.t] + [c.t for c in chain[k:]]
        gaps = sorted(b - a for a, b in itertools.pairwise(times))
        if gaps[len(gaps) // 2] <= SPARSE_S:
            return
        v = int(view.sf[seg])
        vx, vy = float(view.vx[v]), float(view.vy[v])

        def near_v(node: Node) -> bool:
            """Whether the node's logged fix lies within eps of V (not logged: no)."""
            r = node.seq - seq0
            return (0 <= r < self.fix_n
                    and (xy.item(r, 0) - vx) ** 2 + (xy.item(r, 1) - vy) ** 2 <= eps * eps)

        for j in range(k, n):
            if (chain[j].pos > 0.5 or fixes[j].segment not in (seg, seg_in)
                    or not near_v(chain[j])):
                return
        # one fix near V is no stand: a vehicle driving through V onto S sends one too,
        # and then S is as likely the road driven as P (the road in may be the one the
        # path guessed); the fix before must stand at V as well
        if n - k < 2 and not near_v(prev):
            return
        end = float(view.slen[seg_in])
        for j in range(k, n):
            if fixes[j].segment == seg:
                fixes[j] = MatchedFix(chain[j].t, seg_in, end, vx, vy)

    def _stand_from_centre(self, chain: list[Node], s: int) -> int:
        """Where the stand at the end of ``chain`` begins, read about the stand's centre.

        Rule (``MatchSettings.end_stand_centre``, for :meth:`_end_stand`): ``s`` is the
        first node of the run that :meth:`_end_stand` found, the last nodes whose fixes
        lie within ``STAND_SIGMAS`` x ``sigma_m`` of the last fix. Going back from the
        last node, the run grows while every fix of it lies within that radius of the
        run's centre (the median of its fixes' x and of their y), and stops at the first
        node that breaks this. The earlier start is taken only where the fixes of the
        longer run come densely and wander (:meth:`_wandering_run`); else ``s`` is
        returned. Why: a standing vehicle's fixes scatter about where it stands, and the
        last fix is one of them, as likely at the scatter's edge as anywhere: measured
        from it, one fix on the far side of the scatter (2 ``sigma_m`` from the last,
        about 1.4 ``sigma_m`` from the centre) ends the stand early, often on the road
        the drift led onto past the vertex (docs/measured.md "Session 18 (fleet5c)").
        The median is the centre because an outlier among the fixes does not move it.

        Example (the last fix at the scatter's edge, 11 m from the first):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(end_stand_centre=True))
            >>> pts = [(44.0, 2.0), (50.0, 1.0), (49.0, -1.0), (51.0, 2.0), (55.0, 1.0)]
            >>> chain = []
            >>> for i, (x, y) in enumerate(pts):
            ...     _ = tracker.update(Fix("v1", float(i), 0.0, 0.0, x, y))
            ...     chain.append(Node(0, tracker.fix_seq0 + i, float(i), x / 100.0, x, 0.0,
            ...                       chain[-1] if chain else None, (), 0.0, 0.0))
            >>> tracker._stand_from_centre(chain, 1)
            0
        """
        seq0 = self.fix_seq0
        xy = self.fix_xy
        radius2 = (STAND_SIGMAS * self.settings.sigma_m) ** 2
        pts: list[tuple[float, float]] = []
        for node in chain[::-1]:
            r = node.seq - seq0
            if not 0 <= r < self.fix_n:
                break
            pts.append((xy.item(r, 0), xy.item(r, 1)))
        start = len(chain) - 1
        for m in range(2, len(pts) + 1):
            run = pts[:m]
            cx = _median([p[0] for p in run])
            cy = _median([p[1] for p in run])
            if any((x - cx) ** 2 + (y - cy) ** 2 > radius2 for x, y in run):
                break
            start = len(chain) - m
        if start < s and self._wandering_run(chain[start:]):
            return start
        return s

    def _start_stand(self, chain: list[Node], eps: float, fixes: list[MatchedFix],
                     path: list[int]) -> bool:
        """Report a stand at the start of the log on the road it left by; True if moved.

        Rule (``MatchSettings.start_stand``; the first commit of the log only, ``chain``
        its nodes, ``fixes`` their answers and ``path`` the committed path, both changed
        in place): the stand is the longest run of ``chain``'s first nodes whose fixes
        lie within ``STAND_SIGMAS`` x ``sigma_m`` of the first fix; it must span at least
        ``STAND_S`` seconds, its fixes must come densely and wander
        (:meth:`_wandering_run`: median gap at most ``SPARSE_S``, median step at least
        ``STILL_M``), and the chain must go on past it (the vehicle's departure is in
        this commit: a commit forced mid-stand shows none). The stand is reported on
        the first of these candidates that every earlier node fits (:meth:`_stand_on`:
        a node already on the segment, not ahead of the node after, at its own point;
        any other at the point of the segment nearest its fix, never ahead of the node
        after it, within ``eps`` of its fix):

        - the segment of the run's last node B (B keeps its answer), where the path was
          when the vehicle began to move, on the road it left by;
        - else, along the path from the stand's first segment on, each segment driven
          between two nodes of the run (the nodes before the second go on it, after at
          least ``STAND_S``) and each later segment of the run (the last node of its
          visit keeps its answer, at least ``STAND_S`` after the first): when the first
          fix lies on the far side of the stand from the way out, the run reaches a few
          seconds into the drive-off and B lies past short segments out of V whose
          starts lie farther than eps from the first fixes.

        If none fits, or every node of the run is on B's segment already, nothing
        changes. The committed path then begins at the chosen segment's first
        occurrence in it: no answer lies on the segments before it any more.

        Why: a log that begins while the vehicle stands at a vertex V (a dwell, a stop
        at a junction) has no road that came in: the first state may be any segment
        within eps, and while the vehicle stands its GNSS error leans one way for tens
        of seconds (temporally correlated error), so the best path starts on a short
        road into V from the side the error leans to (or out of V onto it) that the
        vehicle never drove, and the vehicle then leaves by another. In the middle of a
        log :meth:`_stand_at_vertex` reads such a stand from the road that came in; at
        the start of the log only the departure shows where the vehicle was: fixes
        that stand show no movement off the road it left by, and a vehicle standing at
        V before it leaves by T is at T's start (the mirror of :meth:`_end_stand`).
        Dense fixes: at 15 or 30 s between fixes a run of ``STAND_S`` is one or two
        steps, as often a slow step or a turning circle as a stand.

        Example (a stand at V = (100, 0) whose fixes lean onto a road into V from the
        south, then the vehicle leaves east):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(100.0, -80.0), (100.0, 0.0)], way=1),
            ...                           Road([(100.0, 0.0), (200.0, 0.0)], way=2)])
            >>> tracker = Tracker(net, "v1", MatchSettings(start_stand=True))
            >>> pts = [(100.5 - 0.1 * (i % 2), -4.0 + 0.1 * i) for i in range(12)]
            >>> pts += [(108.0, 0.5), (118.0, 0.5)]
            >>> chain: list[Node] = []
            >>> for i, (x, y) in enumerate(pts):
            ...     _ = tracker.update(Fix("v1", float(i), 0.0, 0.0, x, y))
            ...     seg, pos = (0, (y + 80.0) / 80.0) if i < 12 else (2, (x - 100.0) / 100.0)
            ...     chain.append(Node(seg, tracker.fix_seq0 + i, float(i), pos, x, y,
            ...                       chain[-1] if chain else None, (), 0.0, 0.0))
            >>> out = [MatchedFix(n.t, n.seg, 0.0, n.x, n.y) for n in chain]
            >>> path = [0, 2]
            >>> tracker._start_stand(chain, 15.0, out, path)
            True
            >>> [(f.segment, round(f.offset_m, 2)) for f in out][:2], path
            ([(2, 0.4), (2, 0.4)], [2])
        """
        seq0 = self.fix_seq0
        xy = self.fix_xy
        n = len(chain)
        r = chain[0].seq - seq0
        if not 0 <= r < self.fix_n:
            return False
        x0, y0 = xy.item(r, 0), xy.item(r, 1)
        radius2 = (STAND_SIGMAS * self.settings.sigma_m) ** 2
        e = 0
        while e + 1 < n:
            r = chain[e + 1].seq - seq0
            if not 0 <= r < self.fix_n:
                break
            dx, dy = xy.item(r, 0) - x0, xy.item(r, 1) - y0
            if dx * dx + dy * dy > radius2:
                break
            e += 1
        if (e + 1 >= n or chain[e].t - chain[0].t < STAND_S
                or not self._wandering_run(chain[:e + 1])):
            return False
        # B: the run's last node; when the stand's fixes do not fit B's segment (the
        # run reached a few seconds into the drive-off, past short segments out of V),
        # the first segment along the path after the stand's first one that they fit
        t0 = chain[0].t
        view = self._view
        anchor = chain[e]
        if all(c.seg == anchor.seg for c in chain[:e]):
            return False  # the stand is on B's segment already: nothing to move
        cands: list[tuple[int, int, bool]] = [(anchor.seg, e, True)]
        k = 1
        while k <= e:
            node = chain[k]
            if chain[k - 1].t - t0 >= STAND_S:
                cands.extend((seg, k, False) for seg in node.via)
            if node.via or node.seg != chain[k - 1].seg:
                b = k  # the last node of this visit of node.seg within the run
                while b < e and chain[b + 1].seg == node.seg and not chain[b + 1].via:
                    b += 1
                if chain[b].t - t0 >= STAND_S and b < e:
                    cands.append((node.seg, b, True))
                k = b
            k += 1
        for seg, b, own in cands:
            got = self._stand_on(chain, b, seg, chain[b].pos if own else 1.0, eps)
            if got is None:
                continue
            if own:
                got.append(MatchedFix(chain[b].t, seg, chain[b].pos * float(view.slen[seg]),
                                      chain[b].x, chain[b].y))
            for k, answer in enumerate(got):
                fixes[k] = answer
            if seg in path:
                del path[:path.index(seg)]
            return True
        return False

    def _stand_on(self, chain: list[Node], b: int, seg: int, pos: float,
                  eps: float) -> list[MatchedFix] | None:
        """``chain[:b]``'s answers on segment ``seg``, up to ``pos``; None if one is past eps.

        For :meth:`_start_stand`: ``pos`` is where the path is on ``seg`` at
        ``chain[b]`` (1.0 where ``seg`` is a segment driven before ``chain[b]``'s own). A
        node already on ``seg``, not ahead of the node after it, keeps its own point;
        any other is put at the point of ``seg`` nearest its fix, never ahead of the
        node after it. None when such a point lies farther than ``eps`` from its fix
        (the fixes do not stand on that segment).
        """
        seq0 = self.fix_seq0
        xy = self.fix_xy
        view = self._view
        ax, ay = view.vx[view.sf[seg]], view.vy[view.sf[seg]]
        ux, uy = view.vx[view.st[seg]] - ax, view.vy[view.st[seg]] - ay
        length2 = ux * ux + uy * uy
        slen = float(view.slen[seg])
        moved: list[MatchedFix] = []
        for k in range(b - 1, -1, -1):
            node = chain[k]
            if node.seg == seg and node.pos <= pos and not chain[k + 1].via:
                pos = node.pos
                moved.append(MatchedFix(node.t, seg, pos * slen, node.x, node.y))
                continue
            r = node.seq - seq0
            fx, fy = xy.item(r, 0), xy.item(r, 1)
            pos, px, py = _slide(fx, fy, ax, ay, ux, uy, length2, pos, ahead=False)
            if (px - fx) ** 2 + (py - fy) ** 2 > eps * eps:
                return None
            moved.append(MatchedFix(node.t, seg, pos * slen, float(px), float(py)))
        moved.reverse()
        return moved

    def _short_sparse_stand(self, nodes: list[Node]) -> bool:
        """Whether a sparse stand at the end of the log is one by the path too.

        With ``MatchSettings.end_stand_sparse``, for :meth:`_end_stand`: ``nodes`` (the
        stand's first node, then the chain's later nodes, in order, each linked to the
        one before it) come more than ``SPARSE_S`` apart (median gap) and the committed
        path's route from the first to the last is at most ``STAND_SIGMAS`` x
        ``sigma_m`` long. Why: at 15-30 s between fixes a stand is two or three fixes,
        and two fixes within 2 ``sigma_m`` of each other are as often a vehicle that went
        round a small loop or a turning circle between them (the path then goes round
        it: its route is the loop's length) as one that stood (the path steps a few
        metres on, past the vertex ahead, as the GNSS error leans: the step this rule
        takes back). The dense case is :meth:`_wandering_run`'s.

        Example (fixes 30 s apart; the path steps 4 m, then goes 40 m round a loop):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(end_stand_sparse=True))
            >>> a = Node(0, 1, 0.0, 0.50, 50.0, 0.0, None, (), 0.0, 0.0)
            >>> b = Node(0, 2, 30.0, 0.54, 54.0, 0.0, a, (), 0.0, 0.0)
            >>> c = Node(0, 3, 60.0, 0.94, 94.0, 0.0, b, (), 0.0, 0.0)
            >>> tracker._short_sparse_stand([a, b]), tracker._short_sparse_stand([a, b, c])
            (True, False)
        """
        if not self.settings.end_stand_sparse:
            return False
        gaps = sorted(b.t - a.t for a, b in itertools.pairwise(nodes))
        if gaps[len(gaps) // 2] <= SPARSE_S:
            return False
        slen = self._view.slen
        route = 0.0
        for a, b in itertools.pairwise(nodes):
            if b.seg == a.seg and not b.via:
                route += abs(b.pos - a.pos) * slen[a.seg]
            else:
                route += ((1.0 - a.pos) * slen[a.seg] + sum(float(slen[v]) for v in b.via)
                          + b.pos * slen[b.seg])
        return route <= STAND_SIGMAS * self.settings.sigma_m

    def _stand_at_vertex(
        self, chain: list[Node], before: Node | None, goes_on: bool, starts: bool,
        eps: float, fixes: list[MatchedFix],
    ) -> None:
        """Report a stand just past a vertex at the vertex, in ``fixes`` (in place).

        Rule (``MatchSettings.stand_at_vertex``): where the committed path enters a
        segment S from a vertex V (coming in by segment P) and the nodes matched on S
        from that entry on form a run whose fixes span at least ``STAND_S`` seconds and
        all lie within ``eps`` of V, as does the fix before the run, those fixes are
        reported at V, as the end of P. The path is unchanged (P and S are both on it).
        The run stops at the first node that leaves S, lies nearer the far end of S than
        V (the vehicle may have stood at that vertex instead; not on a segment shorter
        than ``stand_short_m`` while the run stands, :meth:`_short_run_end`) or whose fix
        lies farther than ``eps`` from V; later nodes keep their answers. Not where P is
        the twin of S (the path turned round at V: at the start of a stretch, P can be a segment
        the vehicle never drove), nor where P is the segment a new stretch (``starts``)
        began on and the path has been nowhere else before the run (a vehicle that
        starts standing at V never drove P either; ``starts`` is the flag
        :meth:`_commit_chain` computed for the chain). Two guards on the fixes from the
        one before the run to the run's last (:meth:`_wandering_run`):

        - they come at most ``SPARSE_S`` apart (their median gap): at 15 or 30 s
          between fixes a run of ``STAND_S`` is one or two fixes, too few to tell a
          stand from a slow step;
        - they move: their median step from one fix to the next is at least
          ``STILL_M``. A receiver that repeats its position gives no sign of a
          wandering error for the path to have followed: a noise-free vehicle that
          stands on V and then drives off along S has the first fixes of its
          drive-off (0.4-10 m past V, within eps) in the run, and they are where
          the vehicle was.

        Why: while a vehicle stands at V its GNSS error leans one way for tens of
        seconds, and the best path follows it a few metres onto the road beyond V. When
        the vehicle then leaves by another way (the way it came, after a turn in the
        street, or round the block), S is a road it never drove, yet the stand was
        committed on it; the path cost cannot tell, because it charges each fix's error
        as independent. Fixes within eps of one point for ``STAND_S`` seconds show no
        movement onto S; V is where the path was when they began, and P is on the
        driven path whatever the vehicle did next. :meth:`_close_stand_loops` cuts such
        a stand out when the path comes back to V within one commit; this covers the
        stands whose path goes on from S (round a block, or the end of the log).

        The certificate still holds: the fixes of the run and the fix before it lie
        within eps of V, so the trace from that earlier fix to the run's last fix lies
        within eps of V (a disc is convex) and is matched to V, the path's points
        before V keeping their matching; after the run's last fix the path runs on
        from V along S to where that fix was matched (one straight piece, both ends
        within eps of the fix: the sweep matched it there) and on as before.

        Example (no stand: nothing changes):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1")
            >>> a = Node(0, 1, 0.0, 0.1, 10.0, 0.0, None, (), 0.0, 0.0)
            >>> b = Node(0, 2, 1.0, 0.2, 20.0, 0.0, a, (), 0.0, 0.0)
            >>> out = [MatchedFix(1.0, 0, 20.0, 20.0, 0.0)]
            >>> tracker._stand_at_vertex([b], a, True, False, 15.0, out)
            >>> out == [MatchedFix(1.0, 0, 20.0, 20.0, 0.0)]
            True
        """
        if chain[-1].t - chain[0].t < STAND_S:
            # no run spans STAND_S (a run's nodes lie within the chain, in time order):
            # most commits at 1 s between fixes hold one to three fixes, and the scan
            # built a closure and walked the chain for nothing (docs/measured.md,
            # "Session 21 (path1hz)"); tests/test_commit_prechecks.py checks the
            # answer against _stand_at_vertex_scan
            return
        self._stand_at_vertex_scan(chain, before, goes_on, starts, eps, fixes)

    def _stand_at_vertex_scan(
        self, chain: list[Node], before: Node | None, goes_on: bool, starts: bool,
        eps: float, fixes: list[MatchedFix],
    ) -> None:
        """:meth:`_stand_at_vertex` without its check of the chain's span: the full scan.

        The rule itself (every entry into a segment looked at, whatever the chain's
        span); kept as the reference the early return is tested against.
        """
        view = self._view
        seq0 = self.fix_seq0
        xy = self.fix_xy
        radius2 = eps * eps

        def near(node: Node, vx: float, vy: float) -> bool:
            r = node.seq - seq0
            if not 0 <= r < self.fix_n:
                return False
            dx = xy.item(r, 0) - vx
            dy = xy.item(r, 1) - vy
            return dx * dx + dy * dy <= radius2

        k = 0 if goes_on else 1
        while k < len(chain):
            n = chain[k]
            prev = chain[k - 1] if k else before
            # an entry into n.seg from its start vertex, and the segment it came in by
            seg_in = n.via[-1] if n.via else (
                prev.seg if prev is not None and prev.seg != n.seg else -1)
            if (seg_in < 0 or prev is None or view.st[seg_in] != view.sf[n.seg]
                    or seg_in == view.twin[n.seg]
                    or (starts and not n.via and all(c.seg == seg_in for c in chain[:k]))):
                k += 1
                continue
            v = int(view.sf[n.seg])
            vx = float(view.vx[v])
            vy = float(view.vy[v])
            m = k
            while (m < len(chain) and chain[m].seg == n.seg and (m == k or not chain[m].via)
                   and chain[m].pos <= 0.5 and near(chain[m], vx, vy)):
                m += 1
            m = self._short_run_end(chain, k, m, vx, vy, near)
            if (m > k and chain[m - 1].t - n.t >= STAND_S and near(prev, vx, vy)
                    and self._wandering_run([prev, *chain[k:m]])
                    and not self._left_before(chain, k, v, vx, vy, near)):
                end = float(view.slen[seg_in])
                for j in range(k, m):
                    fixes[j] = MatchedFix(chain[j].t, seg_in, end, vx, vy)
            k = max(m, k + 1)

    def _short_run_end(self, chain: list[Node], k: int, m: int, vx: float, vy: float,
                       near: Callable[[Node, float, float], bool]) -> int:
        """The end of a stand's run at ``chain[k]`` past the middle of a short segment.

        ``chain[k:m]`` is the run :meth:`_stand_at_vertex` found (up to the middle of S,
        ``chain[k].seg``). On a short S (:meth:`_short_past_middle`) the run goes on
        through the nodes on S whose fixes lie within eps of V = (``vx``, ``vy``), but
        only if all the fixes of the longer run stand: within ``STAND_SIGMAS`` x
        ``sigma_m`` of its last fix, as :meth:`_standing` reads a stand. Why: a vehicle
        that circles a small loop (a turning circle of 2.9 m segments, 22 m across, in
        the bench's random walk) keeps its fixes within eps of one vertex for 10 s while
        it moves; its fixes spread over the loop, a standing vehicle's do not.
        Returns ``m`` when the run is not longer, or does not stand.
        """
        seg = chain[k].seg
        if not self._short_past_middle(seg):
            return m
        end = m
        while (end < len(chain) and chain[end].seg == seg and (end == k or not chain[end].via)
               and near(chain[end], vx, vy)):
            end += 1
        if end == m:
            return m
        radius = STAND_SIGMAS * self.settings.sigma_m
        seq0 = self.fix_seq0
        xy = self.fix_xy
        r = chain[end - 1].seq - seq0
        lx, ly = xy.item(r, 0), xy.item(r, 1)
        for node in chain[k:end]:
            r = node.seq - seq0
            if math.hypot(xy.item(r, 0) - lx, xy.item(r, 1) - ly) > radius:
                return m
        return end

    def _short_past_middle(self, seg: int) -> bool:
        """Whether a stand's run may reach past the middle of ``seg`` (``stand_short_m``).

        :meth:`_stand_at_vertex` stops a run at a node nearer the far end W of S than
        its start V: the vehicle may have stood at W. On a segment shorter than
        ``MatchSettings.stand_short_m`` both ends lie within GNSS error of the stand's
        fixes, which alone cannot tell V from W; the path dragged to W by an error
        leaning that way is what the rule undoes. Reporting the stand at V as the end
        of the road P the path came in by is on the driven path if the vehicle stood
        at V and, as P leads to W through S, within a short S of it if the vehicle
        stood at W.

        Example (off by default; a 100 m segment is not short at 10 m):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> Tracker(net, "v1")._short_past_middle(0)
            False
            >>> Tracker(net, "v1", MatchSettings(stand_short_m=150.0))._short_past_middle(0)
            True
        """
        return bool(self._view.slen[seg] < self.settings.stand_short_m)

    def _left_before(self, chain: list[Node], k: int, v: int, vx: float, vy: float,
                     near: Callable[[Node, float, float], bool]) -> bool:
        """Whether the path left vertex ``v`` near the run at ``chain[k]`` and came back.

        The run starts at ``chain[k]``, where the path comes back into ``v``. Looks at the
        steps from the nodes before it whose fixes lie within eps of ``v`` (back to the
        first that does not) up to ``chain[k]``: a segment that starts at ``v`` among
        them is a loop out of ``v`` and back that :meth:`_close_stand_loops` left in
        place (a fix of it outside the eps disc, or its start in an earlier commit).
        The segment the loop came back by is then one the vehicle standing at ``v`` may
        never have driven, so the run stays where it was matched.
        """
        view = self._view
        sf = view.sf
        j = k
        while True:
            node = chain[j]
            steps = node.via[:-1] if j == k else (*node.via, node.seg)
            if any(int(sf[s]) == v for s in steps):
                return True
            if j == 0 or not near(chain[j - 1], vx, vy):
                return False
            j -= 1

    def _wandering_run(self, nodes: list[Node]) -> bool:
        """Whether the fixes of ``nodes`` come densely and wander (:meth:`_stand_at_vertex`).

        ``nodes`` are in time order, their fixes all in the fix buffer. Dense: the median
        gap between consecutive fixes is at most ``SPARSE_S``. Wander: the median step
        between consecutive fixes is at least ``STILL_M``. Medians, so that one dropped
        fix or one jump does not decide.

        Example (fixes 1 s apart, 1 m steps):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1")
            >>> for i in range(4):
            ...     _ = tracker.update(Fix("v1", float(i), 0.0, 0.0, 50.0 + i, 1.0))
            >>> nodes = [Node(0, tracker.fix_seq0 + i, float(i), 0.5, 0.0, 0.0, None, (),
            ...               0.0, 0.0) for i in range(4)]
            >>> tracker._wandering_run(nodes)
            True
        """
        seq0 = self.fix_seq0
        xy = self.fix_xy
        gaps = sorted(b.t - a.t for a, b in itertools.pairwise(nodes))
        if gaps[len(gaps) // 2] > SPARSE_S:
            return False
        pts = [(xy.item(n.seq - seq0, 0), xy.item(n.seq - seq0, 1)) for n in nodes]
        steps = sorted(math.hypot(bx - ax, by - ay)
                       for (ax, ay), (bx, by) in itertools.pairwise(pts))
        return steps[len(steps) // 2] >= STILL_M

    def _eps_of(self, tree: CandidateTree) -> float:
        """The eps of the level whose tree is ``tree``, in metres.

        A tree no level holds any more (a salvaged one) gets the smallest eps: the
        smaller the radius, the stricter :meth:`_close_stand_loops` is.
        """
        for level in self.levels:
            if level.tree is tree:
                return level.eps
        return self.levels[0].eps

    def _with_laps(
        self, links: list[Node], pieces: list[list[int]]) -> list[int]:
        """The path through ``links`` with the laps of a small loop it misses.

        ``pieces[k]``: the segments entered from ``links[k]`` to ``links[k + 1]``.
        Rule ``MatchSettings.speed_laps`` (see there for why). From one link to the next
        the vehicle drove about ``D = (va + vb) / 2 * dt`` (the two fixes' reported
        speeds, trapezoid rule; a speed below ``LAP_STILL_MPS`` counts as 0); the route
        from one answer to the next is ``L`` long. ``lap_due``, the distance driven that
        the committed path does not show, becomes ``lap_due + (1 - LAP_SLACK) * D - L``
        while that step's shortfall ``(1 - LAP_SLACK) * D - L`` is positive, else 0:
        shortfalls that recur from fix to fix add up (as in a one-sided CUSUM, Page,
        Biometrika 1954), a step's noise (the answers' errors along the road, the
        trapezoid's where the speed changes) is worn away by the slack, and a step the
        route explains ends the run. When it holds at least ``LAP_MIN_M``, the pieces of
        this commit are searched from the newest back for the shortest loop
        (:func:`livematch.core.routing.small_loop`: no U-turn but at a dead end, at most
        ``lap_due`` long) that leaves a vertex the piece passes (the head of the segment
        it comes from or of a segment it enters before the last; for a piece that stays
        on one segment, from that segment's head: the path goes on from there whatever
        follows) and lies wholly within the smallest eps of one of the piece's two
        fixes; ``floor(lap_due / C)`` laps of the first one found (length ``C``) are put
        in there and taken off the sum. A missing speed, or fixes more than ``gap_s``
        apart, start the sum afresh: over a sparse step the two speeds say little of what
        was driven in between (a stop, a slower street), and the route between sparse
        answers is itself a guess, so a shortfall there is no sign of laps (at 15 s on
        the test extract such steps put laps round a small loop the vehicle passed but
        never circled; docs/measured.md "Session 14 (rmfwalk)").

        Example (no speeds known: the path is the pieces as they are):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(speed_laps=True))
            >>> a = Node(0, 1, 0.0, 0.1, 10.0, 0.0, None, (), 0.0, 0.0)
            >>> b = Node(0, 2, 5.0, 0.2, 20.0, 0.0, a, (), 0.0, 0.0)
            >>> tracker._with_laps([a, b], [[]])
            []
        """
        speeds = self.lap_v or {}
        view = self._view
        slen = view.slen
        out = [list(p) for p in pieces]
        eps = self.settings.eps_levels[0]
        gap = self.settings.gap_s
        for k, piece in enumerate(pieces):
            a, b = links[k], links[k + 1]
            va = speeds.get(a.t)
            vb = speeds.get(b.t)
            dt = b.t - a.t
            if va is None or vb is None or dt > gap:
                self.lap_due = 0.0
                continue
            if piece:
                route = (1.0 - a.pos) * slen[a.seg] + b.pos * slen[b.seg]
                for seg in piece[:-1]:
                    route += slen[seg]
            else:
                route = max(0.0, b.pos - a.pos) * slen[a.seg]
            driven = 0.5 * ((va if va >= LAP_STILL_MPS else 0.0)
                            + (vb if vb >= LAP_STILL_MPS else 0.0)) * dt
            step = (1.0 - LAP_SLACK) * driven - route
            # a step the route explains ends the run: what went unexplained before is
            # not carried on to a loop met later
            due = self.lap_due = self.lap_due + step if step > 0.0 else 0.0
            if due < LAP_MIN_M:
                continue
            for m in range(k, -1, -1):  # this piece first, then back through the commit
                found = self._small_loop_in(links[m], links[m + 1], out[m], due, eps)
                if found is not None:
                    length, j, lap = found
                    n = int(due // length)
                    self.lap_due = due - n * length
                    segs = [links[m].seg, *out[m]]
                    out[m] = [*segs[1:j + 1], *(lap * n), *segs[j + 1:]]
                    break
        return [seg for piece in out for seg in piece]

    def _stub_turns_into(self, path: list[int], chain: list[Node], before: Node | None,
                         eps: float) -> None:
        """Apply :meth:`_turns_in_stubs` to the end of ``path`` that the chain's steps entered.

        From ``before`` (the last node committed) on when the path ends with the step
        from it to the chain, else from the chain's first node (a start, a join).
        """
        for links in ([before, *chain], chain) if before is not None else (chain,):
            pieces = [_steps(a.seg, b) for a, b in itertools.pairwise(links)]
            size = sum(map(len, pieces))
            if size and size <= len(path) and path[len(path) - size:] == [
                    seg for piece in pieces for seg in piece]:
                lead = before if links is chain else None
                path[len(path) - size:] = self._turns_in_stubs(links, pieces, eps, lead)
                return

    def _turns_in_stubs(self, links: list[Node], pieces: list[list[int]], eps: float,
                        lead: Node | None = None) -> list[int]:
        """The path through ``links`` with each U-turn at a stub's mouth taken in the stub.

        ``pieces[k]``: the segments entered from ``links[k]`` to ``links[k + 1]``. Rule
        ``MatchSettings.stub_turn_m`` (see there for why): where the path turns round
        at a vertex V (a segment into V, then its twin) that is not a dead end, and
        exactly one other way out of V is a stub (:func:`_stub_from`: two-way segments
        through plain shape points to a dead end, at most ``stub_turn_m`` long), the
        stub's segments there and back are put in between the two, unless the
        vehicle stood at V (:meth:`_stood_near`, over ``lead``, a node committed
        before ``links`` if given, and ``links``): a vehicle that stood may turn round
        where it stood. Only the committed path changes: answers, live or final, do
        not.

        Example (a straight road, no U-turn: the path is the pieces as they are):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1", MatchSettings(stub_turn_m=15.0))
            >>> a = Node(0, 1, 0.0, 0.1, 10.0, 0.0, None, (), 0.0, 0.0)
            >>> b = Node(0, 2, 5.0, 0.2, 20.0, 0.0, a, (), 0.0, 0.0)
            >>> tracker._turns_in_stubs([a, b], [[]], 15.0)
            []
        """
        view = self._view
        twin = view.twin
        seen = [lead, *links] if lead is not None else links
        shift = 1 if lead is not None else 0
        radius = eps + STAND_SIGMAS * self.settings.sigma_m
        out: list[int] = []
        for k, piece in enumerate(pieces):
            prev = links[k].seg
            for seg in piece:
                if seg == twin[prev] and seg >= 0:
                    stub = self._stub_at(view.st[prev], seg)
                    if stub and not self._stood_near(seen, k + shift, view.st[prev], radius):
                        out.extend(stub)
                        out.extend(twin[s] for s in reversed(stub))
                out.append(seg)
                prev = seg
        return out

    def _stub_at(self, vertex: int, way_back: int) -> list[int]:
        """The one stub (:func:`_stub_from`) out of ``vertex`` but ``way_back``.

        [] when there is none or more than one, or ``vertex`` is a dead end.
        """
        view = self._view
        if len(view.out[vertex]) < 2:
            return []  # a dead end: the turn is where the road ends
        found: list[list[int]] = []
        for seg in view.out[vertex]:
            if seg != way_back:
                stub = _stub_from(view, seg, self.settings.stub_turn_m)
                if stub:
                    found.append(stub)
        return found[0] if len(found) == 1 else []

    def _stood_near(self, links: list[Node], k: int, vertex: int, radius: float) -> bool:
        """Whether the vehicle stood at ``vertex`` around step ``k`` of ``links``.

        The run of links that holds ``links[k]`` or ``links[k + 1]`` (the step's two
        ends) and whose fixes all lie within ``radius`` of ``vertex`` spans ``STAND_S``
        seconds or more (the test ``stand_loops`` makes of a stand at a vertex, with
        :meth:`_turns_in_stubs`' radius: eps, plus ``STAND_SIGMAS`` x ``sigma_m`` for
        the spread of a stand's fixes about the point they gather round).

        Example (two fixes 15 s apart, 4 m and 9 m from the vertex at the origin):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1")
            >>> a = Node(0, 1, 0.0, 0.04, 4.0, 0.0, None, (), 0.0, 0.0)
            >>> b = Node(0, 2, 15.0, 0.09, 9.0, 0.0, a, (), 0.0, 0.0)
            >>> tracker._stood_near([a, b], 0, 0, 25.0), tracker._stood_near([a, b], 0, 0, 5.0)
            (True, False)
        """
        view = self._view
        vx = view.vx[vertex]
        vy = view.vy[vertex]

        def near(node: Node) -> bool:
            x, y = self._fix_xy_of(node)
            return math.hypot(x - vx, y - vy) <= radius

        lo = k if near(links[k]) else k + 1
        hi = k + 1 if near(links[k + 1]) else k
        if hi < lo:
            return False
        while lo > 0 and near(links[lo - 1]):
            lo -= 1
        while hi + 1 < len(links) and near(links[hi + 1]):
            hi += 1
        return links[hi].t - links[lo].t >= STAND_S

    def _small_loop_in(
        self, a: Node, b: Node, piece: list[int], limit: float, eps: float
    ) -> tuple[float, int, list[int]] | None:
        """The shortest small loop a lap can take between ``a`` and ``b``, or None.

        As (length, index in ``[a.seg, *piece]`` of the segment whose head it leaves,
        its segments); see :meth:`_with_laps`.
        """
        view = self._view
        twin = view.twin
        centres = (self._fix_xy_of(a), self._fix_xy_of(b))
        segs = [a.seg, *piece]
        found: tuple[float, int, list[int]] | None = None
        for j in range(max(1, len(piece))):
            after = -1 if not piece else twin[segs[j + 1]]
            for centre in centres:
                got = small_loop(view, view.st[segs[j]], limit, centre, eps, twin[segs[j]],
                                 after)
                if got is not None and (found is None or got[1] < found[0]):
                    found = (got[1], j, got[0])
        return found

    def _fix_xy_of(self, node: Node) -> tuple[float, float]:
        """The position of the fix ``node`` answers (its matched point if not logged)."""
        r = node.seq - self.fix_seq0
        if 0 <= r < self.fix_n:
            return self.fix_xy.item(r, 0), self.fix_xy.item(r, 1)
        return node.x, node.y

    def _close_stand_loops(self, chain: list[Node], before: Node, eps: float) -> list[Node]:
        """``chain`` with each out-and-back loop made while the vehicle stood cut out.

        Rule (``MatchSettings.stand_loops``): where the path leaves a vertex V and comes
        back to it by a loop that holds a U-turn, and the fixes matched inside the loop
        (at least one) span at least ``STAND_S`` seconds and all lie within ``eps`` of
        V, those fixes are committed at V (the end of the segment the path came in by)
        and the loop is left out of the path. Loops are taken innermost first (from the
        latest earlier pass through V), and one that overlaps a loop already cut out is
        left as it is, so the fixes go to the vertex nearest where the vehicle stood.

        Why: while a vehicle stands at a junction or a stop, its GNSS error leans to one
        side for tens of seconds. The path cost charges every fix its distance as if the
        errors were independent, so a short branch on that side ("in, U-turn at its end,
        back": one U-turn, the same charge as turning round at V itself) beats standing
        at V by about 1.6 per fix over a minute's stand, and once the vehicle leaves,
        every candidate descends from the detour. Going into a branch and back needs
        movement that fixes within eps of one point over ``STAND_S`` seconds do not show.

        The certificate still holds: the path before V and after it are unchanged; the
        trace piece that the original path matched up to V keeps that matching, and every
        point of the trace from there until the path was back at V lies within eps of V
        (the fixes inside the loop do, checked here, the points the original matching put
        at V do, and a disc is convex), so it is matched to the point V.

        Example (no U-turn in the path: the chain is returned as it is):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1")
            >>> a = Node(0, 1, 0.0, 0.1, 10.0, 0.0, None, (), 0.0, 0.0)
            >>> b = Node(0, 2, 1.0, 0.2, 20.0, 0.0, a, (), 0.0, 0.0)
            >>> tracker._close_stand_loops([b], a, 15.0) == [b]
            True
        """
        if chain[-1].t - chain[0].t < STAND_S and not self.settings.stand_loops_sparse:
            # no loop's fixes span STAND_S (they are nodes of the chain, in time order),
            # and only stand_loops_sparse closes a shorter one: the chain as it is,
            # without building its segments (tests/test_commit_prechecks.py checks the
            # answer against _close_stand_loops_scan)
            return chain
        return self._close_stand_loops_scan(chain, before, eps)

    def _close_stand_loops_scan(self, chain: list[Node], before: Node,
                                eps: float) -> list[Node]:
        """:meth:`_close_stand_loops` without its check of the chain's span: the full scan.

        The rule itself; kept as the reference the early return is tested against.
        """
        view = self._view
        twin = view.twin
        # the path as a list of segments; owner[i]: the chain index of the node whose
        # step entered segs[i] (-1: the node before the chain)
        segs = [before.seg]
        owner = [-1]
        turns = False
        for k, node in enumerate(chain):
            for seg in _steps(segs[-1], node):
                turns = turns or seg == twin[segs[-1]]
                segs.append(seg)
                owner.append(k)
        if not turns:
            return chain
        at = _node_at(owner, len(chain))  # node k sits on segs[at[k]]
        sf = view.sf
        seq0 = self.fix_seq0
        xy = self.fix_xy
        radius2 = eps * eps
        removed = [False] * len(segs)
        moved: dict[int, int] = {}  # node -> the vertex it is now committed at

        sparse = self.settings.stand_loops_sparse

        def stood_in(i: int, j: int) -> bool:
            """Whether segs[i:j] (entered from one vertex, back to it) is a stand loop."""
            first, last = owner[i], owner[j]  # nodes first .. last - 1 lie inside
            if last <= first:
                return False
            if not any(segs[m + 1] == twin[segs[m]] for m in range(i, j - 1)):
                return False
            vertex = sf[segs[i]]
            vx = view.vx[vertex]
            vy = view.vy[vertex]
            if chain[last - 1].t - chain[first].t < STAND_S and not (
                    sparse and self._unseen_loop(chain, before, first, last, segs[i:j],
                                                 vx, vy, radius2)):
                return False
            for k in range(first, last):
                r = chain[k].seq - seq0
                if not 0 <= r < self.fix_n:
                    return False
                dx = xy.item(r, 0) - vx
                dy = xy.item(r, 1) - vy
                if dx * dx + dy * dy > radius2:
                    return False
            return True

        def close(i: int, j: int) -> None:
            for m in range(i, j):
                removed[m] = True
            for k in range(owner[i], owner[j]):
                moved[k] = sf[segs[i]]
                at[k] = i - 1

        if self.settings.stand_loops_outer:
            # the outermost loop first: from the earliest pass through a vertex to its
            # latest return there (see the docstring)
            i = 1
            while i < len(segs):
                vertex = sf[segs[i]]
                for j in range(len(segs) - 1, i, -1):
                    if sf[segs[j]] == vertex and stood_in(i, j):
                        close(i, j)
                        i = j
                        break
                else:
                    i += 1
        else:
            last_pass: dict[int, int] = {}  # vertex -> latest index of segs entered from it
            free = 1  # loops begin at or after this index (none overlaps one closed before)
            for j in range(1, len(segs)):
                vertex = sf[segs[j]]
                i = last_pass.get(vertex, -1)
                last_pass[vertex] = j
                # the innermost loop closing here: from the latest pass through this vertex
                if i < free or not stood_in(i, j):
                    continue
                close(i, j)
                free = j
        if not moved:
            return chain
        out: list[Node] = []
        parent: Node | None = before
        prev_at = 0
        for k, node in enumerate(chain):
            here = at[k]
            via = tuple(segs[m] for m in range(prev_at + 1, here) if not removed[m])
            if k in moved:
                v = moved[k]
                node = Node(segs[here], node.seq, node.t, 1.0, view.vx[v], view.vy[v],
                            parent, via, node.cost, 1.0)
            else:
                node.parent = parent
                node.via = via
            out.append(node)
            parent = node
            prev_at = here
        return out

    def _unseen_loop(self, chain: list[Node], before: Node, first: int, last: int,
                     loop: list[int], vx: float, vy: float, radius2: float) -> bool:
        """Whether a loop out of a vertex at (vx, vy) is one that sparse fixes cannot show.

        For ``MatchSettings.stand_loops_sparse`` (asked by :meth:`_close_stand_loops` for
        a loop whose fixes, ``chain[first:last]``, span less than ``STAND_S``): the fixes
        from the node before the loop on come more than ``SPARSE_S`` apart (median gap)
        and every vertex of the loop's segments ``loop`` lies within eps of the loop's
        vertex (``radius2`` = eps squared), so the whole loop lies in that disc (it is
        convex) together with the loop's fixes (checked by the caller); and the vehicle
        stood, as fixes this sparse show a stand: the step into the loop's first fix or
        the step out of its last fix (``chain[last]``, the node after the loop) is
        slower than ``STOOD_MPS`` in a straight line. A vehicle that turned round at the
        vertex and one that drove the loop between two fixes leave the same fixes; the
        loop exists because the sweep turns round only at junctions and dead ends. A
        vehicle that drove through the loop at speed (a random walk turning at a
        junction within eps) shows no slow step. And every fix of the loop lies nearer
        the vertex than any vertex where the loop turns round: a van that stood at the
        loop's far end (its stop a few metres past the vertex) did drive there
        (docs/measured.md, "Session 18 (fleet30)").

        ``chain[last]`` must exist (the caller's loop ends inside the chain).

        Example (fixes 1 s apart: dense, never such a loop):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1")
            >>> a = Node(0, 1, 0.0, 0.1, 10.0, 0.0, None, (), 0.0, 0.0)
            >>> b = Node(0, 2, 1.0, 0.2, 20.0, 0.0, a, (), 0.0, 0.0)
            >>> tracker._unseen_loop([b], a, 0, 1, [0], 0.0, 0.0, 225.0)
            False
        """
        prev = chain[first - 1] if first else before
        run = [prev, *chain[first:last]]
        gaps = sorted(b.t - a.t for a, b in itertools.pairwise(run))
        if gaps[len(gaps) // 2] <= SPARSE_S:
            return False
        # a stand, as sparse fixes show one: the step into the loop's first fix or the
        # step out of its last fix slower than STOOD_MPS (straight line over time)
        slow = False
        for a, b in ((prev, chain[first]), (chain[last - 1], chain[last])):
            pa = self._logged_fix_of(a)
            pb = self._logged_fix_of(b)
            if pa is not None and pb is not None and b.t > a.t and math.hypot(
                    pb[0] - pa[0], pb[1] - pa[1]) < STOOD_MPS * (b.t - a.t):
                slow = True
        if not slow:
            return False
        view = self._view
        st = view.st
        for seg in loop:
            w = st[seg]
            dx = view.vx[w] - vx
            dy = view.vy[w] - vy
            if dx * dx + dy * dy > radius2:
                return False
        # where the loop turns round (W): each fix of the loop lies nearer the vertex than
        # W, so the fixes put the vehicle at the vertex, not at the loop's far end
        twin = view.twin
        turns = [st[a] for a, b in itertools.pairwise(loop) if b == twin[a]]
        for node in chain[first:last]:
            f = self._logged_fix_of(node)
            if f is None:
                return False
            near = (f[0] - vx) ** 2 + (f[1] - vy) ** 2
            for w in turns:
                if (f[0] - view.vx[w]) ** 2 + (f[1] - view.vy[w]) ** 2 <= near:
                    return False
        return True

    def _turn_back_at_stand(self, chain: list[Node], before: Node, eps: float) -> list[Node]:
        """``chain`` with a loop round a stand read as a turn back at the stand's vertex.

        Rule (``MatchSettings.stand_turnback``): where the committed path leaves a vertex
        A and comes back into A by a loop without a U-turn (segments L = ``segs[i:j]``,
        A the start of ``segs[i]`` and the end of ``segs[j - 1]``), and inside the loop
        the vehicle stood at a vertex V of it (V the start of ``segs[p]``, i <= p < j):
        the first nodes matched at or past V (from ``segs[p]`` on) have fixes within eps
        of V that span at least ``STAND_S`` by themselves, come densely and wander
        (:meth:`_wandering_run`, with the node before them), and begin with a stand
        (their fixes of the first ``STAND_S`` within ``STAND_SIGMAS`` x ``sigma_m`` of
        the last of those, as :meth:`_standing` reads one: a vehicle that stands when
        its path reaches V, not one whose path went on round the loop while its fixes,
        on a small loop, stayed within eps of V; the fix before the run within eps of
        V too) -- then, when every later node matched on the loop has a
        fix within eps of the way back from V to A along the twins of ``segs[i:p]``
        (met in order, never going back along it), the loop is committed as
        "``segs[i:p]``, turn round at V, back to A along their twins": the stand's fixes
        at V (the end of the segment into V), the later ones on the way back where
        their fixes project, and the path after A unchanged; only while the way back
        fits those later fixes no worse than the loop did by more than one U-turn's
        charge (the path cost's distance term, squared distance over 2 ``sigma_m``^2,
        summed: at most ``turn_back_cost``): a vehicle that stood at V and then drove
        on round a ring whose far side lies within eps of the near one (an oval round
        a narrow island) keeps the ring its fixes follow. Of the vertices that
        qualify, the one nearest the mean of its stand's fixes. And only where the way
        back (A -> V) is no longer than the rest of the loop (V -> A) it replaces, so
        the turn asks the vehicle to drive no farther between the stand and the fixes
        after the loop than the loop did: a vehicle that stops at A and goes on round a
        ring whose stand the path matched a little before A, at the far end of the
        ring, is no turn back. Not where a segment of
        ``segs[i:p]`` is one-way (no twin), nor where the chain's last node is on the
        loop (the next commit goes on from it), nor where the loop holds or is entered
        by a U-turn (a step back over the same two vertices by another segment, a road
        the map draws twice, counts as one: the loop is then no ring but a turn in
        disguise, and on the Helsinki extract the stand moved off it onto the other
        drawing of the road).

        Why: a road that forms a small ring (a turning loop at the end of a street, a
        short block) gives the path a way out of a stand and back to A without a
        U-turn, which costs nothing, while turning round at V costs ``turn_back_cost``
        (and ``street_turn_cost`` at a plain shape point, which only a bridged step may
        use). A delivery van that dwells at V and leaves the way it came is then
        committed round the ring, on roads it never drove; the fixes of a stand within
        eps of V followed by fixes within eps of the way back cannot tell the two apart,
        and the van stood at V: it turned round there, where the stand shows it was.
        :meth:`_close_stand_loops` handles loops that hold a U-turn; this one handles
        loops that do not (docs/measured.md, "Session 14 (standv)").

        The certificate holds as for :meth:`_close_stand_loops`: the path up to V keeps
        its matching; the trace from the fix before the stand to the stand's last fix
        lies in the eps disc round V (a disc is convex) and is matched to V; after
        that every fix lies within eps of its point on the way back, the points in
        order along it; from the last of them on the path is unchanged (the node after
        the loop is reached from the last such point along the way back and the
        segments after A, as the sweep reached it from A).

        Example (no loop in the path: the chain is returned as it is):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "v1")
            >>> a = Node(0, 1, 0.0, 0.1, 10.0, 0.0, None, (), 0.0, 0.0)
            >>> b = Node(0, 2, 1.0, 0.2, 20.0, 0.0, a, (), 0.0, 0.0)
            >>> c = Node(0, 3, 2.0, 0.3, 30.0, 0.0, b, (), 0.0, 0.0)
            >>> tracker._turn_back_at_stand([b, c], a, 15.0) == [b, c]
            True
        """
        if chain[-1].t - chain[0].t < STAND_S:
            # no stand's fixes span STAND_S (they are nodes of the chain, in time
            # order): the chain as it is, without building its segments
            # (tests/test_commit_prechecks.py checks the answer against
            # _turn_back_at_stand_scan)
            return chain
        return self._turn_back_at_stand_scan(chain, before, eps)

    def _turn_back_at_stand_scan(self, chain: list[Node], before: Node,
                                 eps: float) -> list[Node]:
        """:meth:`_turn_back_at_stand` without its check of the chain's span: the full scan.

        The rule itself; kept as the reference the early return is tested against.
        """
        view = self._view
        twin = view.twin
        sf = view.sf
        segs = [before.seg]
        owner = [-1]  # owner[m]: the chain index of the node whose step entered segs[m]
        st = view.st
        # turns[m]: U-turns among segs[1:m + 1]; a step back over the same two vertices
        # by another segment (a road the map draws twice) is a U-turn too
        turns = [0]
        for k, node in enumerate(chain):
            for seg in _steps(segs[-1], node):
                last = segs[-1]
                turns.append(turns[-1] + (seg == twin[last] or (
                    sf[seg] == st[last] and st[seg] == sf[last])))
                segs.append(seg)
                owner.append(k)
        if len(segs) < 3:
            return chain
        at = _node_at(owner, len(chain))
        # the loop may begin on the segment before the chain (segs[0], committed before)
        last_pass: dict[int, int] = {int(sf[segs[0]]): 0}
        for j in range(1, len(segs)):
            vertex = int(sf[segs[j]])
            i = last_pass.get(vertex, -1)
            last_pass[vertex] = j
            if i < 0 or at[-1] < j or turns[j - 1] != turns[max(i - 1, 0)]:
                continue  # no loop, its end in the next commit, or a U-turn in or into it
            found = self._turn_in_loop(chain, before, segs, at, i, j, eps)
            if found is not None:
                return self._rebuilt_turn(chain, before, segs, at, i, j, *found)
        return chain

    def _turn_in_loop(self, chain: list[Node], before: Node, segs: list[int], at: list[int],
                      i: int, j: int, eps: float) -> tuple[int, int, list[tuple[int, float, float,
                                                                      float]]] | None:
        """The turn :meth:`_turn_back_at_stand` reads in the loop ``segs[i:j]``, or None.

        Returns (p, end, back): V is the start of ``segs[p]``, the nodes before ``end``
        (from the first at or past ``segs[p]``) are the stand, and ``back`` holds the
        later loop nodes' points on the way back, (index into the way, pos, x, y) each.
        """
        view = self._view
        twin = view.twin
        seq0 = self.fix_seq0
        xy = self.fix_xy
        radius2 = eps * eps
        still = STAND_SIGMAS * self.settings.sigma_m
        inv_two_sigma2 = 0.5 / (self.settings.sigma_m * self.settings.sigma_m)
        loop_nodes = [k for k in range(len(chain)) if i <= at[k] < j]
        if not loop_nodes:
            return None
        run = [chain[loop_nodes[0] - 1] if loop_nodes[0] else before]
        run += [chain[k] for k in loop_nodes]
        gaps = sorted(b.t - a.t for a, b in itertools.pairwise(run))
        if gaps[len(gaps) // 2] > TURNBACK_GAP_S:
            return None  # sparse fixes: see TURNBACK_GAP_S

        def fix_of(node: Node) -> tuple[float, float] | None:
            r = node.seq - seq0
            if not 0 <= r < self.fix_n:
                return None
            return xy.item(r, 0), xy.item(r, 1)

        best: tuple[float, tuple[int, int, list[tuple[int, float, float, float]]]] | None
        best = None
        slen = view.slen
        loop_m = sum(float(slen[s]) for s in segs[i:j])
        for p in range(max(i, 1), j):
            if any(twin[s] < 0 for s in segs[i:p]):
                break
            way_m = sum(float(slen[s]) for s in segs[i:p])
            if 2.0 * way_m > loop_m:
                break  # the way back longer than the rest of the loop it replaces
            v = int(view.sf[segs[p]])
            vx, vy = float(view.vx[v]), float(view.vy[v])
            first = next((k for k in loop_nodes if at[k] >= p), -1)
            if first < 0:
                continue
            end = first
            pts: list[tuple[float, float]] = []
            while end < len(chain) and at[end] < j:
                f = fix_of(chain[end])
                if f is None or (f[0] - vx) ** 2 + (f[1] - vy) ** 2 > radius2:
                    break
                pts.append(f)
                end += 1
            prev = chain[first - 1] if first else before
            f0 = fix_of(prev)
            if (end == first or f0 is None or (f0[0] - vx) ** 2 + (f0[1] - vy) ** 2 > radius2
                    or chain[end - 1].t - chain[first].t < STAND_S
                    or not self._wandering_run([prev, *chain[first:end]])):
                continue
            if not _stood_within(pts, [n.t for n in chain[first:end]], still):
                continue
            # the way back from V to A, and the later loop nodes on it, in order
            way = [int(twin[s]) for s in reversed(segs[i:p])]
            back: list[tuple[int, float, float, float]] = []
            w, low = 0, 0.0
            ok = True
            worse = 0.0  # how much worse the way back fits the later fixes than the loop
            for k in range(end, len(chain)):
                if at[k] >= j:
                    break
                f = fix_of(chain[k])
                if f is None or not way:
                    ok = False
                    break
                hit = project_on(view, way, w, low, f[0], f[1])
                if hit is None or (hit[2] - f[0]) ** 2 + (hit[3] - f[1]) ** 2 > radius2:
                    ok = False
                    break
                w, low = hit[0], hit[1]
                back.append((w, low, hit[2], hit[3]))
                node = chain[k]
                worse += ((hit[2] - f[0]) ** 2 + (hit[3] - f[1]) ** 2
                          - (node.x - f[0]) ** 2 - (node.y - f[1]) ** 2)
            if not ok or worse * inv_two_sigma2 > self.settings.turn_back_cost:
                continue
            mx = sum(x for x, _ in pts) / len(pts)
            my = sum(y for _, y in pts) / len(pts)
            d = math.hypot(mx - vx, my - vy)
            if best is None or d < best[0]:
                best = (d, (p, end, back))
        return None if best is None else best[1]

    def _rebuilt_turn(self, chain: list[Node], before: Node, segs: list[int], at: list[int],
                      i: int, j: int, p: int, end: int,
                      back: list[tuple[int, float, float, float]]) -> list[Node]:
        """``chain`` with the loop ``segs[i:j]`` replaced by the turn back at V.

        ``p``, ``end`` and ``back`` as :meth:`_turn_in_loop` returns them (``back``'s
        first item an index into the way back).
        """
        view = self._view
        twin = view.twin
        way = [int(twin[s]) for s in reversed(segs[i:p])]
        new_segs = [*segs[:p], *way, *segs[j:]]
        shift = p + len(way) - j  # index change of the segments from segs[j] on
        v = int(view.sf[segs[p]])
        vx, vy = float(view.vx[v]), float(view.vy[v])
        placed: list[tuple[Node, int]] = []
        n_back = 0
        for k, node in enumerate(chain):
            if at[k] < p:
                here = at[k]
            elif k < end:
                here = p - 1  # the stand: at V, the end of the segment into V
                seg = new_segs[here]
                node = Node(seg, node.seq, node.t, 1.0, vx, vy, None, (), node.cost, 1.0)
            elif at[k] < j:
                w, pos, x, y = back[n_back]
                n_back += 1
                here = p + w
                node = Node(way[w], node.seq, node.t, pos, x, y, None, (), node.cost, pos)
            else:
                here = at[k] + shift
            placed.append((node, here))
        return relink(placed, before, new_segs)

    def _way_out_of_stand(self, chain: list[Node], before: Node, eps: float) -> list[Node]:
        """``chain`` with the road out of a stand's vertex read from the drive-off.

        Rule ``MatchSettings.stand_way_out``, :func:`livematch.core.wayout.way_out_of_stand`
        (the rule, why, and the certificate are in that module). The tracker gives it the
        fixes and its reading of a stand: nodes whose fixes span at least ``STAND_S``,
        come densely and wander with the node before them (:meth:`_wandering_run`), and
        begin with a stand (:func:`_stood_within`, ``STAND_SIGMAS`` x ``sigma_m``), as
        :meth:`_turn_in_loop` reads one.
        """
        if len(chain) < 2 or chain[-1].t - chain[0].t < STAND_S:
            # no stand fits (it spans STAND_S and has a node after it): most commits at
            # dense fixes are this short, and the scan of the path's vertices cost the
            # whole path about 3.6 % at Helsinki (docs/measured.md, "Session 16 (lead)");
            # tests/test_commit_prechecks.py checks the answer against the scan
            return chain
        return self._way_out_of_stand_scan(chain, before, eps)

    def _way_out_of_stand_scan(self, chain: list[Node], before: Node,
                               eps: float) -> list[Node]:
        """:meth:`_way_out_of_stand` without its check of the chain: the full scan.

        The rule itself; kept as the reference the early return is tested against.
        """
        still = STAND_SIGMAS * self.settings.sigma_m

        def stands(prev: Node, nodes: list[Node]) -> bool:
            if nodes[-1].t - nodes[0].t < STAND_S or not self._wandering_run([prev, *nodes]):
                return False
            pts = [self._fix_xy_of(n) for n in nodes]
            return _stood_within(pts, [n.t for n in nodes], still)

        return way_out_of_stand(self._view, chain, before, eps, self.settings.sigma_m,
                                self._logged_fix_of, stands)

    def _logged_fix_of(self, node: Node) -> tuple[float, float] | None:
        """The fix ``node`` answers, or None if it is no longer in the fix buffer."""
        r = node.seq - self.fix_seq0
        if 0 <= r < self.fix_n:
            return self.fix_xy.item(r, 0), self.fix_xy.item(r, 1)
        return None

    def _join_limit(self, dt: float, straight: float = math.inf) -> float:
        """Longest route (metres) that may join two committed stretches ``dt`` seconds apart.

        The stretches meet where one tree's commit follows another's (a level that
        restarted, a tree that died): the join is the route the vehicle drove between the
        two committed points. It can be at most what the vehicle covers at the plausible
        speed (``bridge_speed_mps`` x ``dt``) plus a margin (``join_margin_m``; 0, the
        default, is twice the largest eps), because each of the two points lies within its
        level's eps of its fix and may be that far ahead of or behind the vehicle along
        the road. A longer shortest route is no join but a
        guess: typically the two stretches lie on two parallel roads and the route
        between them goes round the block. Then the path breaks instead (the vehicle
        jumped, as far as the committed path can tell). An older bound added 100 m more;
        on 20 simulated Helsinki drives of seed 77 (bench/accuracy.py's simulator) the
        loops it let through were 0.7 % (1 Hz) and 0.9 % (15 s) of the true length in
        route mismatch. Only the path between stretches changes, never a fix's answer.

        With ``settings.join_detour`` > 0 the route is also at most ``join_detour`` times
        ``straight`` (the distance between the two committed points, metres) plus twice
        the smallest eps: a join much longer than the line between its ends goes round a
        loop back to a point the last stretch overshot (it ended on a branch not taken,
        or a little past where the next stretch begins), and re-drives the loop.

        Example: 1 s apart with the default ladder (15 / 30 / 60 m) and 40 m/s, a join
        may be 40 + 120 = 160 m long; 0 s apart (two stretches at one fix) 120 m; with
        ``join_detour`` 2, two points 20 m apart 15 s apart: 2 x 20 + 30 = 70 m.
        """
        s = self.settings
        limit = s.bridge_speed_mps * dt + s.join_margin()
        if s.join_detour > 0.0:
            limit = min(limit, s.join_detour * straight + 2.0 * s.eps_levels[0])
        return limit

    def _join_limit_to(self, last: tuple[int, float, int, float], first: Node) -> float:
        """:meth:`_join_limit` for joining the committed point ``last`` to ``first``."""
        x, y = _point(self._view, last[0], last[1])
        return self._join_limit(first.t - last[3], math.hypot(first.x - x, first.y - y))

    def _start_way_out(self, tree: CandidateTree, chain: list[Node], eps: float) -> int:
        """The segment the log's first fix is reported on at its start vertex, or -1.

        Rule (``MatchSettings.start_way_out``; the first commit of the log only): the
        first node of ``chain`` lies on a segment A that the path leaves before the next
        fix (:meth:`_entered_after`, which asks the tree's live candidates when the
        chain is that node alone: all of them must enter the same segment after it),
        the vertex V where A ends lies within the smallest eps level (and ``eps``) of
        the first fix, and the next fix comes ``SPARSE_S`` or more after the first (at
        denser fixes the fixes that follow show a stand at V, :meth:`_start_stand`'s
        case, or a vehicle moving through V, which came in by A). Then the first fix is
        reported at V, at the start of the segment B the path enters there, and -1
        leaves the commit as it was. The caller moves that answer only: the committed
        path still begins with A, B (a commit of that node alone commits B too; the
        next commit goes on from A through B where its chain does, as the tree built
        it, and otherwise joins from V on B; docs/measured.md "Session 18
        (logstart)"). The way out is never read from a fix the spike test has not
        judged yet: when the chain is that node alone and the fix after it is the
        newest, held back for the spike test, -1 (and :meth:`_settle` defers such a
        first commit by one fix, :meth:`_way_out_pending`; an outlier there drew every
        candidate out of V by the road towards it, docs/measured.md "Session 19
        (logstart2)").

        Why: nothing before the log's first fix shows how the vehicle came to V. A is
        on the path only because that one fix lies a few metres short of V, well within
        the GNSS error (a fix whose error leans back along A makes A's start the
        cheaper root: the route from it is longer by those metres, as the chord of a
        first step often is). B is driven after the first fix either way; A only if the
        vehicle came in by it, and not if it stood at V when the log began (a tracker
        switched on in a parked vehicle). V is in the free space of the first fix at
        the smallest level (the radius check): that level's sweep could have started at
        B's start as well; a wider level's eps (30 or 60 m) would move the answer by
        more than the GNSS error explains. The answer at V on B is the one that holds
        whichever way the vehicle came. The path keeps A:
        it is the matcher's reading of how the vehicle came to V, which no fix shows
        or refutes, and dropping it (as for a stretch that starts at the very end of a
        segment, ``pos`` 1) loses route mismatch wherever logs begin mid-trip (routed
        trips with a lead-in) for what it gains where they begin at a stand (the random
        walk); docs/measured.md "Session 18 (logstart)". Mid-log the segment that came
        in is shown by the fixes before; this rule never acts there.

        Example (A runs (0, 0) -> (100, 0), B (100, 0) -> (200, 0); the first fix
        lies 6 m short of V = (100, 0), the second well along B):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1),
            ...                           Road([(100.0, 0.0), (200.0, 0.0)], way=2)])
            >>> tracker = Tracker(net, "v1", MatchSettings(start_way_out=True))
            >>> _ = tracker.update(Fix("v1", 0.0, 0.0, 0.0, 94.0, 1.0))
            >>> a = Node(0, tracker.fix_seq0, 0.0, 0.94, 94.0, 0.0, None, (), 0.0, 0.94)
            >>> b = Node(2, tracker.fix_seq0 + 1, 15.0, 0.6, 160.0, 0.0, a, (), 1.0, 0.6)
            >>> tree = tracker.levels[0].tree
            >>> tracker._start_way_out(tree, [a, b], 15.0)
            2
            >>> tracker._start_way_out(tree, [a, b], 5.0)   # V 6.1 m from the fix
            -1
        """
        if self._lone_before_held(chain):
            return -1  # the way out is read from a fix the spike test has not judged
        return self._way_out_at_start(tree, chain, eps)

    def _lone_before_held(self, chain: list[Node]) -> bool:
        """Whether ``chain`` is one node and the fix after it is the newest, held back.

        Held back for the spike test, which may still drop it (``self.before`` is kept
        while it may: :meth:`_spike_test`).
        """
        return (len(chain) == 1 and self.before is not None
                and self.seq == chain[0].seq + 1)

    def _way_out_pending(self, tree: CandidateTree, chain: list[Node]) -> bool:
        """Whether the log's first commit, ``chain``, is to wait for the next fix.

        It is when ``start_way_out`` would move its answer (:meth:`_way_out_at_start`)
        on the word of the fix after it alone (the chain is one node, and the tree's
        live candidates, whose way out of that node the rule reads, reach no fix but the
        newest), and the spike test has not judged that fix yet. Why: such a fix is
        held back from commits because it may be an outlier, and an outlier draws every
        candidate out by whatever road leads towards it; the rule would then report the
        first fix on a road the path never takes (routed trips test 5 s seed 31 sim-059:
        a 214 m outlier at the second fix, 5 s later; docs/measured.md "Session 19
        (logstart2)"). One fix later the spike test has judged it (dropped: the
        candidates go on from the fixes without it), and the commit is decided on fixes
        that count as evidence. Only the first fix's commit waits, by one fix.
        """
        return (self._lone_before_held(chain) and chain[0].pos < 1.0
                and self._way_out_at_start(tree, chain, self._eps_of(tree)) >= 0)

    def _way_out_at_start(self, tree: CandidateTree, chain: list[Node], eps: float) -> int:
        """:meth:`_start_way_out` without asking whether the fix after is still held."""
        first = chain[0]
        if first.pos <= 0.0:
            # at A's start vertex: A is itself the road the path leaves that vertex by,
            # the answer that holds whichever way the vehicle came; nothing to move
            return -1
        after = chain[1].t if len(chain) > 1 else self.fix_time(first.seq + 1)
        if after is None or after - first.t < SPARSE_S:
            return -1
        view = self._view
        r = first.seq - self.fix_seq0
        if not 0 <= r < self.fix_n:
            return -1
        v = view.st[first.seg]
        dx = view.vx[v] - self.fix_xy.item(r, 0)
        dy = view.vy[v] - self.fix_xy.item(r, 1)
        radius = min(eps, self.settings.eps_levels[0])
        if dx * dx + dy * dy > radius * radius:
            return -1
        return self._entered_after(tree, chain)

    def _entered_after(self, tree: CandidateTree, chain: list[Node]) -> int:
        """The segment the path enters right after the first node of ``chain``, or -1.

        From the chain itself; when the chain is that node alone, from the paths of the
        tree's live candidates, only if every one of them goes through that node and
        enters the same segment after it (-1 otherwise: the commit stays as it was, and
        no later commit can contradict it).
        """
        first = chain[0]
        if len(chain) > 1:
            entered = _steps(first.seg, chain[1])
            return entered[0] if entered else -1
        found = -1
        for row in range(tree.lo, tree.hi):
            ahead, _ = tree.chain(self._view, row, first.seq)
            if len(ahead) < 2 or ahead[0].seg != first.seg or ahead[0].seq != first.seq:
                return -1
            entered = _steps(first.seg, ahead[1])
            if not entered or (found >= 0 and entered[0] != found):
                return -1
            found = entered[0]
        return found

    def _fill_skipped(
        self, chain: list[Node], before: Node | None, until: float, fixes: list[MatchedFix]
    ) -> list[MatchedFix]:
        """Final answers for filtered fixes (outliers, poor accuracy) settled by this commit.

        Such a fix's own position is not evidence, but its time is: its answer is the
        point reached at that time along the committed path, interpolating linearly in
        time between the neighbouring matched fixes (held at the ends).
        """
        due = [t for t in self.skipped if t < until]
        if not due:
            return fixes
        self.skipped = tuple(t for t in self.skipped if t >= until)
        links = [before, *chain] if before is not None else chain
        out = list(fixes)
        for t in due:
            k = bisect.bisect_left([n.t for n in links], t)
            if k == 0:
                seg, pos = links[0].seg, links[0].pos
            elif k == len(links):
                seg, pos = links[-1].seg, links[-1].pos
            else:
                a, b = links[k - 1], links[k]
                share = (t - a.t) / (b.t - a.t)
                if self.settings.filtered_pace:
                    share = _paced_along(self._view, links, k, share)
                seg, pos = _along(self._view, a, b, share)
            x, y = _point(self._view, seg, pos)
            out.append(MatchedFix(t, seg, pos * self._view.slen[seg], x, y))
        out.sort(key=lambda m: m.t)
        return out

    def _monotone_final(
        self, fixes: list[MatchedFix], path: list[int], starts: bool
    ) -> list[MatchedFix]:
        """The commit's final answers moved so that they never go back along its path.

        Each answer is read as a distance along the committed path (from the previous
        commit's last answer on, when the path joins on to it); the distances are
        replaced by their least-squares non-decreasing fit (:func:`isotonic_fit`), no
        lower than the previous commit's last answer, and each fitted distance is
        clamped into its own answer's segment: the segment of every answer stays as it
        was, only its offset and point move (``MatchSettings.monotone_final``). With
        ``monotone_pool`` there is no such bound: the last block of the previous
        commit's fit (its mean along the path and how many answers it pooled, kept in
        ``along_last``) takes part in this fit as one weighted value, so that a stand
        committed a fix or two at a time is pooled across commits instead of ratcheted
        forward; an answer may then lie behind the previous commit's last one.

        A path is directed (a turn round enters the twin segment), so distance along it
        grows through U-turns; segments bridged between fixes count their whole length.
        The path is cut where a segment's head is not the next one's tail (a break): the
        pieces are fitted apart, and only the first one is bounded by the previous
        commit. An answer whose segment the walk along the path does not find is left
        as it is (and takes no part in the fit).

        Example (a vehicle standing at 50 m on a 100 m road, its answers jittering):
            >>> from livematch.core.build import Road, network_from_roads
            >>> net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0)], way=1)])
            >>> tracker = Tracker(net, "van", MatchSettings(monotone_final=True))
            >>> fixes = [MatchedFix(float(t), 0, off, off, 0.0)
            ...          for t, off in enumerate((50.0, 53.0, 47.0, 50.0))]
            >>> [f.offset_m for f in tracker._monotone_final(fixes, [0], True)]
            [50.0, 50.0, 50.0, 50.0]
        """
        view = self._view
        slen = view.slen
        prev = None if starts else self.along_last
        local = list(path)
        if prev is not None and self.last_commit is not None:
            top_seg = self.last_commit[0]
            local[:0] = [prev[0]] if prev[0] == top_seg else [prev[0], top_seg]
        else:
            prev = None
        if not local:
            return fixes
        # run of each path index (a new run where the path does not connect), and the
        # distance along its run to the start of each segment
        runs = [0] * len(local)
        starts_m = [0.0] * len(local)
        for j in range(1, len(local)):
            a, b = local[j - 1], local[j]
            if view.st[a] == view.sf[b]:
                runs[j] = runs[j - 1]
                starts_m[j] = starts_m[j - 1] + float(slen[a])
            else:
                runs[j] = runs[j - 1] + 1
        at: list[int] = []  # path index of each answer (-1: not found)
        j = 0
        for f in fixes:
            k = j
            while k < len(local) and local[k] != f.segment:
                k += 1
            if k < len(local):
                at.append(k)
                j = k
            else:
                at.append(-1)
        out = list(fixes)
        pool = self.settings.monotone_pool
        block: tuple[int, float, float] | None = None  # segment, mean from its start, weight
        for run in sorted({runs[k] for k in at if k >= 0}):
            idx = [i for i, k in enumerate(at) if k >= 0 and runs[k] == run]
            along = [starts_m[at[i]] + fixes[i].offset_m for i in idx]
            weights = [1.0] * len(along)
            lower = -math.inf
            carried = 0
            if prev is not None and run == 0:
                if not pool:
                    lower = prev[1]
                elif prev[3] > 0.0:
                    along.insert(0, prev[2])
                    weights.insert(0, prev[3])
                    carried = 1
            free = isotonic_fit(along, weights=weights)
            fitted = np.maximum(free, lower)[carried:]
            # the last block of the fit: the values fitted to the last value's mean
            tail = len(free) - 1
            while tail > 0 and free[tail - 1] == free[-1]:
                tail -= 1
            last_i = idx[-1]
            block = (fixes[last_i].segment, float(free[-1]) - starts_m[at[last_i]],
                     float(sum(weights[tail:])))
            for i, value in zip(idx, fitted.tolist(), strict=True):
                f = fixes[i]
                length = float(slen[f.segment])
                off = min(max(value - starts_m[at[i]], 0.0), length)
                if off != f.offset_m:
                    x, y = _point(view, f.segment, off / length if length > 0.0 else 0.0)
                    out[i] = MatchedFix(f.t, f.segment, off, x, y)
        last = out[-1]
        if block is not None and block[0] == last.segment and at[-1] >= 0:
            self.along_last = (last.segment, last.offset_m, block[1], block[2])
        else:
            self.along_last = (last.segment, last.offset_m, 0.0, 0.0)
        return out

    def _trim(self, seq: int, t: float) -> None:
        """Cut history no future commit needs; force-prune trees deeper than the lag.

        The compiled walk (:meth:`CandidateTree.trim`) runs only when the cut moved past
        the one the level's links already respect (``Level.cut``) or a forced prune is
        due: a new state's back-pointer leads to a state of the fix before, never to one
        older than a cut made since, so with the cut where it was the walk would change
        nothing (same trees, same ``trim_seq``). A level whose commit check ran after a
        commit this fix was cut by that call (:meth:`_settle`), so it is usually skipped.
        """
        cut = self.next_commit - 1
        max_lag = self.settings.max_lag_fixes
        # (smallest_agrees: a commit deferred up to agreed_seq starts the forced prune's
        # count there, as the commit would have; cut_links still cuts at cut)
        floor = self.agreed_seq if self.agreed_seq >= self.next_commit else -1
        for level in self.levels:
            tree = level.tree
            if tree.hi == tree.lo:
                continue
            if level.trim_seq < floor:
                level.trim_seq = floor
            trim_seq = level.trim_seq if level.trim_seq > cut else cut
            if cut <= level.cut and seq - trim_seq <= 2 * max_lag:
                level.trim_seq = trim_seq  # what the walk would have returned
                continue
            level.trim_seq, forced = tree.trim(self.next_commit, seq, level.trim_seq, max_lag,
                                               self.last_seg)
            level.cut = cut
            if forced >= 0:
                level.tree_seq = max(level.tree_seq, forced)

    # ---------------------------------------------------------- serialisation
    def to_bytes(self, compress: bool = False) -> bytes:
        """Versioned serialisation of the whole state; a restored tracker continues exactly.

        ``LMT6``: the 4-byte format, a flags byte (bit 0: what follows is zlib-compressed,
        level 1, when ``compress``), then a 4-byte header length, a JSON header (the
        scalars, floats written with ``repr`` precision; a dict, so a field added later is
        one more key, read with a default) and the arrays' bytes as they are: each
        level's candidate tree, compacted to the rows still needed (rows' ints, rows'
        positions, the live rows' low and cost, vias, then one time per fix from the
        first row's fix on; layout in :mod:`livematch.core._tree_kernel`), the fix
        positions, then the spike test's copy of the levels. Uncompressed, a checkpoint
        costs a few tens of microseconds, about a tenth of the zlib-compressed ``LMT3``
        (``bench/checkpoint.py``), and is about three times as long; ``compress`` trades
        the time back for the size. :meth:`from_bytes` also reads ``LMT5`` (as ``LMT6``
        with low, pos and cost in every row and no live floats apart: an older row's
        low and cost are dropped), ``LMT4`` (as ``LMT5`` with each row's fix time in
        the row, no list of times), ``LMT3`` (as ``LMT4``, zlib-compressed at level 6, no
        flags byte), ``LMT2`` (each row also with its matched point, recomputed from the
        row's segment and position, bit for bit) and ``LMT1`` (JSON rows).
        """
        arrays: list[bytes | memoryview] = []
        levels = _pack_levels(self.levels, arrays)
        # the fix positions a live score may still read (_fix_floor on)
        skip = min(self.fix_n, max(0, self._fix_floor(self.seq) - self.fix_seq0))
        arrays.append(self.fix_xy[skip:self.fix_n].tobytes())
        before = None
        if self.before is not None:
            b = self.before
            before = [b.last, b.speed, b.last_seg, _pack_levels(b.levels, arrays)]
        times = self.times
        t0 = self.times0
        state = {
            "vehicle": self.vehicle,
            "n_segments": self.network.n_segments,
            "seq": self.seq,
            "last": self.last,
            "last_released_t": self.last_released_t,
            "jumps": self.jumps,
            "speed": self.speed,
            # (LMT3: [[seq, t], ...]); the same JSON as when they were a dict
            "times": [list(range(t0, t0 + len(times))), times.tolist()],
            "next_commit": self.next_commit,
            "last_commit": self.last_commit,
            "last_seg": self.last_seg,
            "levels": levels,
            "fixes": [self.fix_seq0 + skip, self.fix_n - skip],
        }
        # written only when not empty (read with a default): most states have none
        if self.buffer:
            state["buffer"] = [[f.vehicle, f.t, f.lon, f.lat, f.x, f.y, f.accuracy, f.speed,
                                f.heading, f.route] for f in self.buffer]
        if self.skipped:
            state["skipped"] = self.skipped
        if before is not None:
            state["before"] = before
        if self.stand_from is not None:
            state["stand"] = [self.stand_from, self.stood_t]
        if self.stand_seq:
            state["stand_seq"] = self.stand_seq
        if self.agreed_seq >= self.next_commit:
            # written only while it bounds the live window (absent: -1, as in older states)
            state["agreed_seq"] = self.agreed_seq
        if self.step_dir is not None:  # with reverse_turns only
            state["step_dir"] = self.step_dir
        if self.rev_t is not None:  # with lone_reverse_turns only
            state["rev_t"] = self.rev_t
        if self.last_v is not None:  # with speed_pace_m only, and only with reported speeds
            state["last_v"] = self.last_v
        if self.lap_v:  # with speed_laps only, and only with reported speeds
            state["lap_v"] = [list(self.lap_v), list(self.lap_v.values()), self.lap_due]
        if self.along_last is not None:  # with monotone_final only
            state["along"] = self.along_last
        if self.said is not None:  # only with hold_filtered
            # t, segment, offset_m, x, y, eps_m, window_fixes, window_s
            said = self.said
            state["said"] = list(_SAID.unpack(said))
        header = json.dumps(state, separators=(",", ":")).encode()
        body = b"".join((len(header).to_bytes(4, "little"), header, *arrays))
        if compress:
            return STATE_FORMAT + b"\x01" + zlib.compress(body, 1)
        return STATE_FORMAT + b"\x00" + body

    @staticmethod
    def compressed_state(data: bytes) -> bytes:
        """``to_bytes(compress=True)`` of the tracker whose ``to_bytes()`` is ``data``.

        The same bytes as the tracker would write compressed (the body deflated at zlib
        level 1 behind the flags byte 1), made without the tracker: a pipeline keeps a
        parked vehicle's state uncompressed inside bytes deflated as a whole, and gives
        out the checkpoint it would have written when asked. ``data`` already
        compressed, or of an older format, is returned as it is.
        """
        if data[:len(STATE_FORMAT)] != STATE_FORMAT or data[4:5] != b"\x00":
            return data
        return STATE_FORMAT + b"\x01" + zlib.compress(memoryview(data)[5:], 1)

    @classmethod
    def from_bytes(
        cls, network: RoadNetwork, settings: MatchSettings | None, data: bytes
    ) -> Tracker:
        """Restore a tracker written by :meth:`to_bytes` (``LMT6``; ``LMT5`` to ``LMT1`` too)."""
        fmt = data[:len(STATE_FORMAT)]
        if fmt not in _READABLE:
            raise BadStateError(f"not a livematch tracker state (expected {STATE_FORMAT!r})")
        try:
            if fmt in (STATE_FORMAT, STATE_FORMAT_V5, STATE_FORMAT_V4):
                flags = data[4] if len(data) > 4 else -1
                if flags == 0:
                    body = memoryview(data)[5:]
                elif flags == 1:
                    body = memoryview(zlib.decompress(memoryview(data)[5:]))
                else:
                    raise ValueError(f"unknown flags {flags}")
            else:
                body = memoryview(zlib.decompress(memoryview(data)[len(STATE_FORMAT):]))
            if fmt == STATE_FORMAT_V1:
                state, rest = json.loads(bytes(body)), body[:0]
            else:
                size = int.from_bytes(body[:4], "little")
                if 4 + size > len(body):
                    raise ValueError("header cut short")
                state, rest = json.loads(bytes(body[4:4 + size])), body[4 + size:]
        except (zlib.error, ValueError) as exc:
            raise BadStateError(f"corrupt tracker state: {exc}") from exc
        if state["n_segments"] != network.n_segments:
            raise BadStateError("tracker state was written for a different network")
        tracker = cls(network, state["vehicle"], settings)
        if [lv[0] for lv in state["levels"]] != [lv.eps for lv in tracker.levels]:
            raise BadStateError("tracker state was written with a different eps ladder")
        at = 0  # read position in the raw arrays after the header (LMT2 on)
        if fmt == STATE_FORMAT_V1:
            nodes: list[Node] = []
            for seg, seq, t, pos, x, y, parent, via, cost, low in state["nodes"]:
                nodes.append(Node(seg, seq, t, pos, x, y,
                                  nodes[parent] if parent >= 0 else None, tuple(via), cost,
                                  low))
            for lv, (_, tree_seq, cert_seq, cert_t, trim_seq, live) in zip(
                    tracker.levels, state["levels"], strict=True):
                lv.tree_seq, lv.cert_seq, lv.cert_t = tree_seq, cert_seq, cert_t
                lv.trim_seq = trim_seq
                lv.tree = CandidateTree.from_nodes({seg: nodes[i] for seg, i in live})
            tracker.fix_seq0 = state["seq"] + 1  # no fix positions: the score starts anew
        else:
            # the row layout: LMT6's, or LMT5's (low, pos, cost in every row), or rows
            # with their fix's time (LMT4, LMT3), or also with the matched point (LMT2)
            old = (0 if fmt == STATE_FORMAT else 3 if fmt == STATE_FORMAT_V5
                   else 2 if fmt == STATE_FORMAT_V2 else 1)
            at = _unpack_levels(tracker.levels, state["levels"], rest, 0, old)
            # absent in older states: no fix positions, the live score starts with
            # new fixes
            seq0, n = state.get("fixes", (state["seq"] + 1, 0))
            if at + 16 * n > len(rest):
                raise BadStateError("corrupt tracker state: fix positions cut short")
            if n:
                tracker.fix_xy = np.frombuffer(rest, np.float64, 2 * n, at).reshape(n, 2).copy()
            tracker.fix_seq0, tracker.fix_n = seq0, n
            at += 16 * n
            before = state.get("before")  # absent in states written before the spike test
            if before is not None:
                last, speed, last_seg, packed = before
                levels = tuple([Level(lv.eps) for lv in tracker.levels])
                _unpack_levels(levels, packed, rest, at, old)
                tracker.before = _Before(tuple(last) if last else None, speed, last_seg,
                                         levels)
        tracker.seq = state["seq"]
        tracker.last = tuple(state["last"]) if state["last"] else None
        tracker.last_released_t = state["last_released_t"]
        tracker.jumps = state["jumps"]
        tracker.speed = state.get("speed")  # absent in older states
        # LMT4 leaves out an empty buffer and skipped list
        tracker.buffer = tuple(Fix(*row) for row in state.get("buffer", ()))
        times = state["times"]
        seqs, ts = times if fmt in (STATE_FORMAT, STATE_FORMAT_V5, STATE_FORMAT_V4) else (
            [k for k, _ in times], [v for _, v in times])
        if len(seqs) != len(ts) or seqs != list(range(seqs[0] if seqs else 1,
                                                      (seqs[0] if seqs else 1) + len(seqs))):
            # every writer kept a contiguous run in order (the tracker's only shape)
            raise BadStateError("corrupt tracker state: fix times not a run of fixes")
        tracker.times = array("d", ts)
        tracker.times0 = seqs[0] if seqs else 1
        tracker.next_commit = state["next_commit"]
        tracker.skipped = tuple(state.get("skipped", ()))
        tracker.last_seg = state["last_seg"]
        tracker.last_commit = tuple(state["last_commit"]) if state["last_commit"] else None
        stand = state.get("stand")  # written only with stop_turns (absent in older states)
        if stand is not None:
            tracker.stand_from, tracker.stood_t = tuple(stand[0]), stand[1]
        tracker.stand_seq = state.get("stand_seq", 0)  # written only during a stand
        # written only with smallest_agrees, while it bounds the live window
        tracker.agreed_seq = state.get("agreed_seq", -1)
        # written only with reverse_turns, and only when set; absent (older states, or
        # written with reverse_turns off), it is rebuilt from the fix log
        if "step_dir" in state:
            tracker.step_dir = state["step_dir"]
        elif (tracker.settings.reverse_turns or tracker.settings.reverse_turns_near
              or tracker.settings.lone_reverse_turns):
            tracker.step_dir = tracker._logged_step_dir()
        # written only with lone_reverse_turns, and only when set; absent (older states),
        # no reversal is known (the next one counts as lone)
        tracker.rev_t = state.get("rev_t")
        tracker.last_v = state.get("last_v")  # written only with speed_pace_m (and a speed)
        lap = state.get("lap_v")  # written only with speed_laps (absent in older states)
        if lap is not None:
            tracker.lap_v = dict(zip(lap[0], lap[1], strict=True))
            tracker.lap_due = lap[2]
        along = state.get("along")  # written only with monotone_final (absent in older states)
        if along is not None:
            tracker.along_last = (int(along[0]), float(along[1]), float(along[2]),
                                  float(along[3]))
        said = state.get("said")  # written only with hold_filtered (absent in older states)
        if said is not None:
            tracker.said = _SAID.pack(*said)
        _share_numbers(tracker)
        return tracker


def _share_numbers(tracker: Tracker) -> None:
    """Make equal numbers of a restored tracker one object each (memory only).

    A tracker driven fix by fix holds one object for a fix's time and sequence number
    wherever it keeps them (``times``, ``last``, the levels' windows, the last commit);
    JSON gives each occurrence an object of its own (24 bytes a float, 28 an int above
    256). Zero is left alone (0.0 and -0.0 are equal keys).
    """
    floats: dict[float, float] = {}
    ints: dict[int, int] = {}

    def fl(v: float) -> float:
        return floats.setdefault(v, v) if v else v

    def it(v: int) -> int:
        return ints.setdefault(v, v)

    t = tracker
    t.seq = it(t.seq)
    t.next_commit = it(t.next_commit)
    t.fix_seq0 = it(t.fix_seq0)
    t.last_seg = it(t.last_seg)
    t.times0 = it(t.times0)  # (the times themselves are unboxed)
    if t.last is not None:
        t.last = (fl(t.last[0]), t.last[1], t.last[2])
    if t.last_released_t is not None:
        t.last_released_t = fl(t.last_released_t)
    if t.last_commit is not None:
        seg, pos, seq, when = t.last_commit
        t.last_commit = (it(seg), pos, it(seq), fl(when))
    if t.stand_from is not None:
        if t.last is not None and _same(t.stand_from, t.last):
            t.stand_from = t.last  # a run of fixes that starts at the newest one
        else:
            t.stand_from = (fl(t.stand_from[0]), t.stand_from[1], t.stand_from[2])
    if t.stood_t is not None:
        t.stood_t = fl(t.stood_t)
    levels = t.levels if t.before is None else (*t.levels, *t.before.levels)
    for lv in levels:
        lv.tree_seq = it(lv.tree_seq)
        lv.cert_seq = it(lv.cert_seq)
        lv.trim_seq = it(lv.trim_seq)
        lv.cert_t = fl(lv.cert_t)
    if t.before is not None and t.before.last is not None:
        b = t.before.last
        t.before.last = (fl(b[0]), b[1], b[2])


def _same(a: tuple[float, ...], b: tuple[float, ...]) -> bool:
    """Whether ``a`` and ``b`` hold the same floats (a zero's sign included)."""
    return a == b and all(x != 0.0 or math.copysign(1.0, x) == math.copysign(1.0, y)
                          for x, y in zip(a, b, strict=True))


def _weights_of(s: MatchSettings) -> tuple[float, float, float, float, float]:
    """The sweep kernel's step scalars after eps, x0, y0, x1, y1, chord (StepContext).

    The weights of the cost terms, then ``StepContext.roll_back`` (-1: the rule off).

    Written into the network's step scratch when another tracker's settings wrote it
    last (``SweepArrays.step_for``): a tuple per tracker was about 140 bytes, and a
    module-level memo would be state outside the core's objects.
    """
    return (1.0 / (2.0 * s.sigma_m * s.sigma_m), 1.0 / s.beta_m, s.turn_back_cost,
            1.0 / s.motion_m, s.roll_back_slack_m if s.no_roll_back else -1.0)


def motion_gain(dt: float, tau: float) -> float:
    """How much more the motion term weighs a step ``dt`` s long (rule ``motion_step``).

    ``1 / min(1, sqrt(2 (1 - exp(-dt / tau))))``: the inverse of the standard deviation of
    the error of a fix-to-fix step, in units of the fixes' own (per axis), for GNSS error
    that is first-order Gauss-Markov with time constant ``tau`` (variance of the
    difference of two samples rho apart: 2 sigma^2 (1 - rho)). 1 for ``tau`` <= 0 (no
    correlation assumed) and for steps long enough that the step is no better known than
    a fix.

        >>> round(motion_gain(5.0, 30.0), 2)
        1.8
        >>> motion_gain(60.0, 30.0), motion_gain(5.0, 0.0)
        (1.0, 1.0)
    """
    if tau <= 0.0 or dt <= 0.0:
        return 1.0
    spread = math.sqrt(2.0 * -math.expm1(-dt / tau))
    return 1.0 / spread if spread < 1.0 else 1.0


def _pack_levels(levels: tuple[Level, ...],
                 arrays: list[bytes | memoryview]) -> list[list[float | int]]:
    """The header rows of ``levels`` for :meth:`Tracker.to_bytes`; their arrays go to ``arrays``.

    The arrays' buffers (the parts of tight copies,
    :meth:`CandidateTree.packed_parts`), not copies of their bytes: ``bytes.join`` reads
    them.
    """
    rows: list[list[float | int]] = []
    for lv in levels:
        n, nv, live, t0, parts = lv.tree.packed_parts()
        rows.append([lv.eps, lv.tree_seq, lv.cert_seq, lv.cert_t, lv.trim_seq, n, nv, live,
                     t0, parts[4].nbytes // 8])
        arrays += parts
    return rows


def _unpack_levels(levels: tuple[Level, ...], rows: list[list[float | int]], rest: memoryview,
                   at: int, old: int = 0) -> int:
    """Fill ``levels`` from header ``rows`` and the arrays in ``rest`` from ``at`` on.

    ``old``: 0 for ``LMT6`` (rows' ints, their positions, the live rows' low and cost,
    vias, then one time per fix); 3 for ``LMT5`` (as LMT6 with low, pos, cost in every
    row and no live floats); 1 for ``LMT4`` and ``LMT3`` (each row with its fix's time,
    no list of times, and its vias' start and length where LMT5 keeps their end); 2 for
    ``LMT2`` (each row also with its matched point, dropped here). Returns where the
    next arrays start. The trees get arrays of their own (copies: ``rest`` may be
    read-only), none for an empty part (:meth:`CandidateTree.unpacked`).
    """
    row_f = (ROW_F if not old else _V5_ROW_F if old == 3 else _V4_ROW_F if old == 1
             else _V2_ROW_F)
    row_i = _V4_ROW_I if old in (1, 2) else STATE_ROW_I
    end = len(rest)
    for lv, head in zip(levels, rows, strict=True):
        _, tree_seq, cert_seq, cert_t, trim_seq, n_rows, n_vias, live = head[:8]
        t0, n_times = (int(head[8]), int(head[9])) if old in (0, 3) else (0, 0)
        lv.tree_seq, lv.cert_seq, lv.cert_t = int(tree_seq), int(cert_seq), float(cert_t)
        lv.trim_seq = int(trim_seq)
        nr, nv, nl = int(n_rows), int(n_vias), int(live)
        at_f = at + nr * row_i * 4
        at_l = at_f + nr * row_f * 8
        at_v = at_l + (nl * LIVE_F * 8 if not old else 0)
        at_t = at_v + nv * 4
        nxt = at_t + n_times * 8
        if nr < 0 or nv < 0 or n_times < 0 or not 0 <= nl <= nr or nxt > end:
            raise BadStateError("corrupt tracker state: candidate tree cut short")
        if nr:
            ti = np.frombuffer(rest, np.int32, nr * row_i, at)
            tf = np.frombuffer(rest, np.float64, nr * row_f, at_f)
            tv = np.frombuffer(rest, np.int32, nv, at_v)
            if not old:
                times = np.frombuffer(rest, np.float64, n_times, at_t)
                lf = np.frombuffer(rest, np.float64, nl * LIVE_F, at_l)
                try:  # rows out of fix order (the tree keeps each fix's first row)
                    lv.tree = CandidateTree.unpacked(ti, tf, lf, tv, nl, times, t0)
                except ValueError as exc:
                    raise BadStateError(f"corrupt tracker state: {exc}") from exc
            elif old == 3:
                times = np.frombuffer(rest, np.float64, n_times, at_t)
                lv.tree = CandidateTree.unpacked_rows(ti, tf, tv, nl, times, t0)
            else:
                tf = tf.reshape(nr, row_f)
                if old == 2:
                    tf = tf[:, _V2_KEPT]
                # each row's vias ended where it says (start + length): rows were
                # written tight, each row's vias after the row before's
                ints = ti.reshape(nr, row_i)
                ti = np.empty((nr, STATE_ROW_I), np.int32)
                ti[:, :3] = ints[:, :3]
                ti[:, 3] = ints[:, 3] + ints[:, 4]
                lv.tree = CandidateTree.unpacked_timed(ti, tf, tv, int(live))
        else:
            lv.tree = CandidateTree()
        at = nxt
    return at


def _along(view: NetworkView, a: Node, b: Node, frac: float) -> tuple[int, float]:
    """The (segment, position) a fraction ``frac`` of the way along the route a -> b."""
    legs: list[tuple[int, float, float]] = []  # segment, from pos, to pos
    if not b.via and b.seg == a.seg:
        legs.append((a.seg, a.pos, max(a.pos, b.pos)))
    else:
        legs.append((a.seg, a.pos, 1.0))
        legs.extend((s, 0.0, 1.0) for s in b.via)
        legs.append((b.seg, 0.0, b.pos))
    total = sum((hi - lo) * view.slen[s] for s, lo, hi in legs)
    want = frac * total
    for s, lo, hi in legs:
        length = (hi - lo) * view.slen[s]
        if want <= length and length > 0.0:
            return s, lo + want / view.slen[s]
        want -= length
    return b.seg, b.pos


def _route_m(view: NetworkView, a: Node, b: Node) -> float:
    """The length in metres of the route a -> b, read as :func:`_along` reads it."""
    if not b.via and b.seg == a.seg:
        return max(0.0, b.pos - a.pos) * view.slen[a.seg]
    total = (1.0 - a.pos) * view.slen[a.seg] + b.pos * view.slen[b.seg]
    for s in b.via:
        total += view.slen[s]
    return total


def _paced_along(view: NetworkView, links: list[Node], k: int, share: float) -> float:
    """The share of the route links[k-1] -> links[k] driven by a time ``share`` of the way.

    ``MatchSettings.filtered_pace``: the speeds at the two ends are those of the steps
    next to them (links[k-2] -> links[k-1], links[k] -> links[k+1]), the mean speed of the
    route where there is no such step (or it takes no time), and :func:`_paced_share`
    joins them smoothly. A route of no length: ``share`` unchanged.
    """
    a, b = links[k - 1], links[k]
    dist = _route_m(view, a, b)
    if dist <= 0.0 or b.t <= a.t:
        return share
    mean = dist / (b.t - a.t)
    v0 = mean
    if k >= 2 and a.t > links[k - 2].t:
        v0 = _route_m(view, links[k - 2], a) / (a.t - links[k - 2].t)
    v1 = mean
    if k + 1 < len(links) and links[k + 1].t > b.t:
        v1 = _route_m(view, b, links[k + 1]) / (links[k + 1].t - b.t)
    return _paced_share(share, v0 / mean, v1 / mean)


def _paced_share(u: float, alpha: float, beta: float) -> float:
    """The cubic Hermite curve through (0, 0) and (1, 1) with end slopes alpha, beta, at u.

    The distance along a route against time, both as shares of the whole: slopes are
    speeds as multiples of the mean speed. Slopes are limited as Fritsch & Carlson (SIAM
    J. Numer. Anal. 17, 1980) show keeps the curve monotone: each at least 0 and, where
    alpha^2 + beta^2 > 9, both scaled down onto that circle. Equal slopes of 1 give the
    straight line (distance in proportion to time).

    Example (a stop at the far end: more of the way is driven early on):
        >>> _paced_share(0.5, 1.0, 1.0), _paced_share(0.5, 2.0, 0.0), _paced_share(0.0, 3.0, 3.0)
        (0.5, 0.75, 0.0)
    """
    alpha = max(0.0, alpha)
    beta = max(0.0, beta)
    r = alpha * alpha + beta * beta
    if r > 9.0:
        f = 3.0 / math.sqrt(r)
        alpha *= f
        beta *= f
    u2 = u * u
    u3 = u2 * u
    y = (-2.0 * u3 + 3.0 * u2) + alpha * (u3 - 2.0 * u2 + u) + beta * (u3 - u2)
    return min(1.0, max(0.0, y))


def _point(view: NetworkView, seg: int, pos: float) -> tuple[float, float]:
    """Coordinates of position ``pos`` on segment ``seg``."""
    a, b = view.sf[seg], view.st[seg]
    return (view.vx[a] + pos * (view.vx[b] - view.vx[a]),
            view.vy[a] + pos * (view.vy[b] - view.vy[a]))


def _stood_within(pts: list[tuple[float, float]], times: list[float], radius: float) -> bool:
    """Whether ``pts`` (fixes at ``times``) begin with a stand of ``STAND_S`` seconds.

    A stand: the fixes from the first to the first one ``STAND_S`` or more after it all
    lie within ``radius`` of that last one (as :meth:`Tracker._standing` reads one).

    Example (10 s within a metre, then a walk at 3 m/s; and the walk first):
        >>> pts = [(12.0, 0.5)] * 11 + [(12.0 + 3.0 * i, 0.0) for i in range(1, 5)]
        >>> _stood_within(pts, [float(i) for i in range(15)], 10.0)
        True
        >>> _stood_within(pts[::-1], [float(i) for i in range(15)], 10.0)
        False
    """
    for b, t in enumerate(times):
        if t - times[0] >= STAND_S:
            bx, by = pts[b]
            return all(math.hypot(x - bx, y - by) <= radius for x, y in pts[:b])
    return False


def stand_step(dt: float, chord: float, gap_s: float, radius: float) -> bool:
    """Whether a step of ``dt`` seconds and ``chord`` metres shows a stand (``stand_pace``).

    True for a step longer than ``gap_s`` (a sparse feed's step, always bridged) whose
    two fixes lie within ``radius`` of each other (2 ``sigma_m``: within GNSS noise; the
    vehicle stood through the step, or turned round where it stood). At 1-10 s between
    fixes a stand is seen fix by fix and the step is not bridged unless its window died,
    so only gaps count there.

    Example (30 s steps: 8 m is a stand, 25 m is not; nor is a 5 s step):
        >>> stand_step(30.0, 8.0, 10.0, 10.0), stand_step(30.0, 25.0, 10.0, 10.0)
        (True, False)
        >>> stand_step(5.0, 1.0, 10.0, 10.0)
        False
    """
    return dt > gap_s and chord <= radius


def _step_dir(prev: tuple[float, float, float], fix: Fix) -> float:
    """Direction (radians, from the x axis) of the step from ``prev`` (t, x, y) to ``fix``."""
    return math.atan2(fix.y - prev[2], fix.x - prev[1])


def _stub_from(view: NetworkView, seg: int, limit_m: float) -> list[int]:
    """The segments of the stub ``seg`` begins, or [] when it begins none.

    A stub: ``seg`` and the segments after it, all two-way, through vertices where the
    road goes on one way only (a vertex left by the way back and one other segment),
    to a dead end (a vertex left only by the way back), at most ``limit_m`` long in all.

    Example (a 10 m two-way road from a junction to a dead end is a stub of one
    segment; the same road with a 50 m limit of 5 m is none):
        >>> from livematch.core.build import Road, network_from_roads
        >>> net = network_from_roads([Road([(0.0, 0.0), (10.0, 0.0)], way=1)])
        >>> v = view_of(net)
        >>> [_stub_from(v, s, 15.0) for s in range(2)], _stub_from(v, 0, 5.0)
        ([[0], [1]], [])
    """
    twin = view.twin
    out = view.out
    total = 0.0
    segs: list[int] = []
    while True:
        if twin[seg] < 0 or seg in segs:
            return []
        total += view.slen[seg]
        if total > limit_m:
            return []
        segs.append(seg)
        ways = [s for s in out[view.st[seg]] if s != twin[seg]]
        if not ways:
            return segs
        if len(ways) != 1:
            return []
        seg = ways[0]


def _steps(prev_seg: int, node: Node) -> list[int]:
    """Segments entered going from ``prev_seg`` to ``node``: its via, then its own segment."""
    if not node.via and node.seg == prev_seg:
        return []
    return [*node.via, node.seg]


class _Before:
    """The matching state before a tracker's newest fix, kept for the spike test.

    Attributes:
        last: time and position (t, x, y) of the fix before the newest one.
        speed: the implied speed of the step to that fix, m/s (None if none).
        last_seg: the segment of the assignment of that fix.
        levels: copies of the levels (trees, windows) as they were after that fix.
    """

    __slots__ = ("last", "last_seg", "levels", "speed")

    def __init__(self, last: tuple[float, float, float] | None, speed: float | None,
                 last_seg: int, levels: tuple[Level, ...]) -> None:
        self.last = last
        self.speed = speed
        self.last_seg = last_seg
        self.levels = levels


def _median(values: list[float]) -> float:
    """The median of ``values`` (not empty): the middle one, or the mean of the two middle.

    The same value as the standard library's ``statistics.median`` (a module the core
    does not import).

    >>> _median([3.0, 1.0, 2.0]), _median([4.0, 1.0, 2.0, 3.0]), _median([5.0])
    (2.0, 2.5, 5.0)
    """
    ordered = sorted(values)
    n = len(ordered)
    mid = n // 2
    return ordered[mid] if n % 2 else (ordered[mid - 1] + ordered[mid]) / 2


def _charge_heading(tree: CandidateTree, arrays: SweepArrays, slen: npt.NDArray[np.float64],
                    head: tuple[float, float], s: MatchSettings) -> None:
    """Add the heading charge (``MatchSettings.heading_cost``) to the new live states' costs.

    ``head``: the fix's heading as a unit vector in the grid; ``slen``: every segment's
    length. A state pays at most ``s.heading_cost``; the vehicle may be
    ``HEADING_REACH_SIGMAS * s.sigma_m`` along the road from it.
    The charge depends on a state's segment, its position and the segment its route came
    by, as the step made it (the parent it kept chosen without the charge), and on the
    fix (:func:`livematch.core.heading.state_charges`): added after the step, it moves
    no back-pointer of that step and no reachable position, only the costs later
    rankings read (the parents later steps keep among them). The commit point the step's compiled
    call answered is the live states' deepest common ancestor, which no cost enters.
    """
    if tree.hi <= tree.lo:
        return
    segs = tree.ti[K_SEG + ROW_I * tree.lo:K_SEG + ROW_I * tree.hi:ROW_I]
    costs = tree.costs()
    costs += state_charges(arrays.seg_geo, segs, tree.live_along(slen),
                           tree.live_before, head[0], head[1], s.heading_cost,
                           HEADING_REACH_SIGMAS * s.sigma_m)


def _charge_class(tree: CandidateTree, arrays: SweepArrays, charge: float) -> None:
    """Add the class charge (``MatchSettings.class_cost_m``) to the new live states' costs.

    ``charge``: ``class_cost_m / beta_m``, paid by each live state whose segment is on a
    minor road (``arrays.seg_minor``), unless every live state is: the charges are taken
    less the least of them, as the heading charge's are, so a level whose candidates
    are all service aisles (a car park) pays nothing and its costs stay those of a
    tracker without the rule. Added after the step (:func:`_charge_heading` says what
    that leaves alone): the step that adds it keeps the parents it chose without it,
    every later step, ranking and commit sees it through the path cost.

    Example (a residential street and a service road 3 m beside it, a state on each):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.fastsweep import sweep_arrays
        >>> from livematch.core.view import view_of
        >>> net = network_from_roads([
        ...     Road([(0.0, 0.0), (100.0, 0.0)], way=1, oneway=True, highway="residential"),
        ...     Road([(0.0, 3.0), (100.0, 3.0)], way=2, oneway=True, highway="service")])
        >>> tree = CandidateTree()
        >>> tree.extend({s: Node(s, 1, 0.0, 0.5, 50.0, 3.0 * s, None, (), 1.0, 0.0)
        ...              for s in (0, 1)}, {})
        >>> _charge_class(tree, sweep_arrays(view_of(net)), 0.25)
        >>> tree.costs().tolist()
        [1.0, 1.25]
        >>> _charge_class(CandidateTree(), sweep_arrays(view_of(net)), 0.25)  # no state
    """
    if tree.hi <= tree.lo:
        return
    segs = tree.ti[K_SEG + ROW_I * tree.lo:K_SEG + ROW_I * tree.hi:ROW_I]
    minor = arrays.seg_minor[segs]
    if minor.min() > 0.0:
        return  # every state on a minor road: no state ranks better for it
    costs = tree.costs()
    costs += minor * charge


def _copy_level(level: Level) -> Level:
    """A copy of ``level`` whose tree holds only the rows still needed."""
    out = Level(level.eps)
    out.tree = level.tree.packed()
    out.tree_seq, out.cert_seq, out.cert_t = level.tree_seq, level.cert_seq, level.cert_t
    out.trim_seq = level.trim_seq
    return out


def _best_cost(tree: CandidateTree) -> float:
    """The lowest path cost among the live states of a non-empty tree."""
    return tree.best_cost()


def _goes_on(level: Level, seq: int) -> bool:
    """Whether ``level`` is alive with a tree that began before fix ``seq``."""
    return len(level.tree) > 0 and level.tree_seq < seq


def _node_at(owner: list[int], n: int) -> list[int]:
    """Per node of a chain of ``n`` nodes, the index of the step it sits on.

    ``owner[i]`` is the node whose arrival made step ``i`` (-1: a step before the chain);
    a node that made no step of its own (it stayed on its segment) sits on the step of
    the node before it, so the answer never decreases.
    """
    at = [0] * n
    for i, k in enumerate(owner):
        if k >= 0:
            at[k] = i
    for k in range(1, n):
        at[k] = max(at[k], at[k - 1])
    return at
