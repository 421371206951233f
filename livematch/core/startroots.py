"""The first commit of a log, re-decided root by root (rule ``start_roots``).

Why: a log that begins while the vehicle is already moving has no history, and at its
first fix every segment within eps is a root of the candidate tree. Where two roads run
side by side a few metres apart (a road drawn twice, a carriageway beside a service road)
both roots stay alive. The sweep keeps one state per segment, with one back-pointer: when
the cheapest way onto the road actually driven goes from the other root through a link
between the two roads, every later state on the right road descends from the wrong root.
By the time the candidates merge (or a forced commit comes), they all share that wrong
root, and the first commit fixes the wrong road for the log's first fixes.

The union of all roots is not what each root reaches alone, either: in the sweep a vertex
is settled by the entry that reaches it earliest along the fix step (then the cheapest),
and every segment out of it takes that entry's parent. So the state on the road beyond
a merge can descend from the other road's root even when the path along the road driven
is cheaper (the plain case of ``tests/test_startroots.py`` at 5 s: 4.60 through the other
root against 4.00 alone), and a root swept alone can still be within eps at a fix where
the union died and bridged (Helsinki, seed 31, drive 36).

The rule, pure and deterministic, asked by the tracker when the log's first commit is
due: replay the tree's fixes once per root, with only that root alive (the reference
sweep of :mod:`livematch.core.sweep`). When the root of the tree's best candidate does
not reach the newest fix that way (the tree bridged where that root alone cannot go on)
but other roots do, rank those by the rule that picks the best candidate of a forced
commit at dense fixes (the live score, which weighs GNSS error that is correlated in
time), each by its best live state; the tracker rebuilds the tree from the winner's
states alone and decides the commit on it. Only while fixes come less than
``sparse_s`` apart (median): at 15 or 30 s between fixes the window dies and the tree
bridges as a matter of course, and there the rule lost fixes on the decision runs.
A path that stays within eps of every fix by sweeping is preferred to one
that needed a bridge, as the tracker itself does when it bridges only where every
sweep died.
"""

from __future__ import annotations

import dataclasses
import itertools
import math
from collections.abc import Sequence

from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.sweep import Node, StepContext, fresh_start, live_score, sweep_step
from livematch.core.view import view_of


def _motion_gain(dt: float, tau: float) -> float:
    """The ``motion_step`` weight of a step ``dt`` long (as ``tracker.motion_gain``)."""
    if tau <= 0.0 or dt <= 0.0:
        return 1.0
    spread = math.sqrt(2.0 * -math.expm1(-dt / tau))
    return 1.0 / spread if spread < 1.0 else 1.0


def replay(
    network: RoadNetwork, settings: MatchSettings, eps: float, root: Node,
    fixes: Sequence[tuple[int, float, float, float]],
) -> dict[int, Node]:
    """The states at the last of ``fixes`` swept from ``root`` alone (empty if it died).

    ``fixes``: (seq, t, x, y) of each fix from the root's own on, in order. Each step is
    the reference sweep (:func:`livematch.core.sweep.sweep_step`) at ``eps``; a step
    whose window dies ends the replay (no bridging: a root that needs a bridge to go
    on is not one the rule compares).
    """
    view = view_of(network)
    live = {root.seg: root}
    inv_motion = 1.0 / settings.motion_m
    for (_, t0, x0, y0), (seq, t, x, y) in itertools.pairwise(fixes):
        ctx = StepContext.between(view, settings, eps, x0, y0, x, y, seq, t)
        if settings.motion_step:
            dt = t - t0
            gain = _motion_gain(dt, settings.error_tau_s) if dt > 0.0 else 1.0
            ctx = dataclasses.replace(ctx, motion_cost=inv_motion * gain)
        live = sweep_step(live, ctx)
        if not live:
            return {}
    return live


def best_root(
    network: RoadNetwork, settings: MatchSettings, eps: float, current: int,
    fixes: Sequence[tuple[int, float, float, float]], sparse_s: float,
) -> dict[int, Node] | None:
    """The live states of the root that ranks best, when it is not ``current``; else None.

    Args:
        network: the road network.
        settings: the cost weights, ``sigma_m``, ``error_tau_s``, ``gap_s``.
        eps: the level's eps (metres).
        current: the root segment of the tree's best live candidate.
        fixes: (seq, t, x, y) of every fix of the tree, from its root fix to the newest.
        sparse_s: the rule acts only while the median gap between fixes is below
            this; the roots are then ranked by live score
            (:func:`livematch.core.sweep.live_score`; path cost with ``error_tau_s``
            0), as a forced commit ranks candidates at such fixes.

    Each segment within eps of the first fix is a root; each is replayed alone
    (:func:`replay`). Only when ``current``'s own replay does not reach the newest fix
    (the tree had to bridge a step its best candidate's root cannot sweep through
    alone) are the roots whose replay lives ranked, each by its best live state at the
    newest fix; the winner's live states (linked back to it) are returned, None on a
    tie. When ``current``'s replay lives, None: the tree's commit stands. (Ranking
    every root against a live ``current`` by score alone was tried and lost fixes:
    docs/measured.md, "Session 16 (movestart)".)
    """
    if len(fixes) < 2:
        return None
    view = view_of(network)
    seq0, t0, x0, y0 = fixes[0]
    ctx0 = StepContext.between(view, settings, eps, x0, y0, x0, y0, seq0, t0)
    roots = fresh_start(network, ctx0)
    if len(roots) < 2 or current not in roots:
        return None
    gaps = sorted(b[1] - a[1] for a, b in itertools.pairwise(fixes))
    half = len(gaps) // 2
    median = gaps[half] if len(gaps) % 2 else 0.5 * (gaps[half - 1] + gaps[half])
    if median >= sparse_s:
        return None  # sparse fixes: a bridge is the common case there, no sign of a loss
    positions = {seq: (x, y) for seq, _, x, y in fixes}
    inv_two_sigma2 = 1.0 / (2.0 * settings.sigma_m * settings.sigma_m)
    ranked: list[tuple[float, int, dict[int, Node]]] = []
    for seg in sorted(roots):
        live = replay(network, settings, eps, roots[seg], fixes)
        if not live:
            continue
        score = min((live_score(n, positions, seq0, inv_two_sigma2, settings.error_tau_s,
                                settings.gap_s) if settings.error_tau_s > 0.0 else n.cost)
                    for n in live.values())
        ranked.append((score, seg, live))
    if not ranked or any(r[1] == current for r in ranked):
        return None  # the tree's own root gets there by sweeping: its commit stands
    ranked.sort(key=lambda r: (r[0], r[1]))
    if len(ranked) > 1 and ranked[0][0] == ranked[1][0]:
        return None
    return ranked[0][2]
