"""Settings of the per-vehicle tracker, validated at construction.

The shell maps the ``[matcher]`` section of a TOML configuration file onto
:class:`MatchSettings` key by key; :meth:`MatchSettings.problems` lists what is wrong in
terms of those keys so that the config loader can name the file and the key.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, fields


@dataclass(frozen=True, slots=True, kw_only=True)
class MatchSettings:
    """How the online matcher decides, commits and filters. Units: metres, seconds.

    Attributes:
        eps_levels: the eps ladder, strictly increasing, metres. The smallest level still
            alive decides. 15 / 30 / 60 m covers good GNSS in the open, urban multipath
            and degraded canyons (common practice for consumer GNSS error, from memory).
        max_lag_fixes, max_lag_s: a candidate path older than this is committed even
            while several candidates are alive (the best one wins); bounds state size.
        max_speed_mps: a fix implying a faster move from the previous accepted fix is an
            impossible jump and is filtered (60 m/s = 216 km/h).
        max_accuracy_m: fixes reporting a worse horizontal accuracy are filtered.
        reorder_fixes: how many fixes to hold back to put late arrivals in order
            (0 = no hold-back: a late fix is filtered as out of order).
        gap_s, gap_m: a step longer than either is a gap, bridged by routing.
        bridge_speed_mps: the plausible speed bounding a bridged route's length.
        detour_factor: a bridged route is also at most ``detour_factor`` times the
            straight step plus ``gap_m``: routes much longer than the straight line
            between two fixes are implausible (common practice in map matching).
        sigma_m: GNSS error scale of the path cost's distance term (metres); 5 m is a
            typical open-sky consumer receiver (common practice, from memory).
        beta_m: scale of the path cost's term for the difference between route length
            and straight-line step length (metres), as in Newson & Krumm (2009).
        turn_back_cost: cost charged per U-turn on a candidate path (unitless, in the
            same units as the other terms: one U-turn weighs like a 2 sigma miss).
        motion_m: scale of the path cost's motion term (metres): the difference between
            the matched point's displacement and the fixes' displacement over one step,
            divided by ``motion_m``. It tells the road ahead from a side branch.
        pace_m: scale of the path cost's pace term (metres), charged in bridged steps
            only (a gap, or a window that died): the difference between a candidate
            route's length and the length the same candidate would have driven at the
            speed of its previous step, divided by ``pace_m``. At 15-30 s between fixes
            it tells "drove to the end of the dead end and came back" from "stood still"
            (:mod:`livematch.core.sweep`).
        junction_hold: while candidates whose live score (see ``error_tau_s``) is within
            this margin of the best one disagree about the branch taken at a junction, the
            live assignment stays at that junction (0 disables). Where the newest step was
            rescored (``error_tau_s`` > 0, step <= ``gap_s``) the margin is divided by
            sqrt(1 - rho^2), rho = exp(-step / error_tau_s): 11.8 at 1 s, 5.6 at 5 s with
            the defaults (tuned on seeded drives). Commits are unaffected.
        junction_hold_m: the live assignment stays at such a junction only while the best
            candidate has driven at most this far past it along its path (metres); beyond
            that the held answer would be stale, and the best candidate is reported.
        error_tau_s: time constant (seconds) of the GNSS error's autocorrelation, used to
            rank the live candidates: the live assignment goes to the lowest live score
            (:func:`livematch.core.sweep.live_score`), which charges a candidate for
            changes of its offset from the fixes rather than for the offset itself, so a
            side road the error leans towards does not win the live answer. 0 ranks by
            path cost. 30 s is the low end of the tens of seconds consumer GNSS error
            wanders over (common practice, from memory). A forced commit (``max_lag_*``)
            ranks by the same score while fixes come less than 5 s apart; other commits are
            unaffected.
        spike_cost: the retroactive spike test's charge for dropping a fix (path cost
            units, see :mod:`livematch.core.sweep`; 0 disables), for a fix between two
            15 s steps and in proportion to the time the two steps span. One fix later, a
            fix of a sparse vehicle (5-35 s after the fix before) is dropped as a
            ``spike`` when the path without it fits the next fix better by more than
            the charge (:meth:`livematch.core.tracker.Tracker._spike_test`). It catches
            the outliers that no speed bound can: 300 m off in 15 s is a plausible move.
            30 was chosen on simulated drives (bench/accuracy.py's simulator, seeds other
            than the bench's).
        street_turns: let a bridged step (a gap, or a window that died) turn round at
            any vertex, shape points in the middle of a road included, at
            ``turn_back_cost`` plus ``street_turn_cost``; the sweep itself keeps U-turns to
            dead ends and junctions.
            For fleets that turn round in the street (a delivery van leaving a stop the way
            it came). Off by default: on the accuracy harness's routed-trip drives
            (``--sim trips``) it gains 1-2 points of final accuracy at 5-30 s and cuts the
            route mismatch at 15 s from about 5 % to about 1.3 %, but on random-walk drives
            that never turn in the street it costs up to 1.3 points at 30 s (README;
            measured before ``street_turn_cost``).
        stop_turns: the same freedom only for a bridged step that leaves a stop (the step
            before it was slower than ``livematch.core.tracker.STOOD_MPS``): a vehicle that
            stood and then leaves the way it came; with ``stand_wait``, also a bridged step
            within 10 s of a stand (:meth:`livematch.core.tracker.Tracker._stood_lately`).
            On by default, with
            ``street_turn_cost`` 4: on bench/accuracy.py's drives (seeds 31 and 77, 80
            drives) it gains 1.0-1.4 points of final accuracy at Helsinki 15 / 30 s and
            1.9-2.3 on the test extract on routed trips (``--sim trips``), and costs the
            random walk 0-0.16 points (without the charge 0.6 at Helsinki 15 / 30 s).
        street_turn_cost: charged on top of ``turn_back_cost`` for each U-turn where the
            network has none (a vertex in the middle of a road, which only ``street_turns``
            and ``stop_turns`` open to bridged steps): a turn in the street is rarer than
            one at a dead end or a junction, and a vehicle that stood at a traffic light
            and drove on must not be read as one that turned round. 4 by default: with
            ``stop_turns`` it takes back what the random walk lost to ``stop_turns``
            alone (Helsinki 15 / 30 s, seed 31: 0.951 / 0.915 -> 0.957 / 0.921, as
            without ``stop_turns``) and keeps the routed trips' gain; 2 kept less of the
            first. Live accuracy on trips is 0.4-1.5 points below ``stop_turns`` alone
            (the live answer believes a turn in the street a fix later), still above
            ``stop_turns`` off.
        stand_wait: while the vehicle stands (its fixes of 10 s within 2 ``sigma_m`` of
            each other, until 10 s after that; :meth:`livematch.core.tracker.Tracker.
            _standing`), the fix-count lag (``max_lag_fixes``) does not force a commit;
            ``max_lag_s`` still does (so it matters at about 1 Hz only). A commit forced
            during a stand picks among candidates that the wandering GNSS error has spread
            along the road around the stop, and a vehicle that then leaves the way it came
            is committed on road ahead that it never drove.
        stand_hold: while the vehicle stands now (its fixes of the last 3 s within 2
            ``sigma_m`` of the newest one; :meth:`livematch.core.tracker.Tracker.
            _stand_start`), the live assignment stays where the best candidate's path was
            when the stand began (at the vertex it had just passed, if that is within
            ``sigma_m``), as long as every fix since then lies within eps of that point,
            so the certificate holds (:meth:`livematch.core.tracker.Tracker.
            _hold_at_stand`). Without it the live answer follows the GNSS error as it
            wanders along the road during the stand, past the stop onto road beyond it (a
            branch not taken, or road never driven when the vehicle leaves the way it
            came). Commits are unaffected.
        pace_reach: a bridged step also searches routes as long as a live candidate's own
            pace predicts (its last step's speed times the time since), where that is
            longer than ``detour_factor`` times the straight step plus ``gap_m``
            (:func:`livematch.core.sweep.bridge_reach`); ``bridge_speed_mps`` still
            bounds every route. The pace term (``pace_m``) already expects such a route,
            so the detour bound must not rule it out: at 30 s between fixes a vehicle
            that drove into a dead end and back, or round a block, was otherwise given
            only wrong roads. On by default: bench/accuracy.py, 30 s, 80 drives, random
            walk seed 31: final accuracy +0.4 points on both extracts (Helsinki 0.921 ->
            0.925, test 0.924 -> 0.928); seed 77 and routed trips -0.1 to +0.3; with the
            spike test at 30 s (``livematch.core.tracker.SPIKE_MAX_S``) +0.1 to +0.9 and
            route mismatch -0.6 to -1.8 points on seeds 31 and 77, both drive models.
            1-15 s: unchanged on those drives.
        join_detour: where one candidate tree's commit follows another's, the route
            joining the two committed points is at most ``join_detour`` times the straight
            distance between them plus twice the smallest eps, besides the speed bound
            (:meth:`livematch.core.tracker.Tracker._join_limit`); a longer join breaks the
            path there instead. 0 disables (only the speed bound). Why: when the last
            stretch ended on a branch not taken, or a little past where the next one
            begins, the shortest join goes round a loop back to that point, and the
            committed path re-drives the loop (on bench/accuracy.py's drives, 150-600 m
            loops at 5-30 s between fixes). 2 is the bridge's own detour factor (common
            practice: a route much longer than the line between its ends is implausible).
            Only the committed path changes, never a fix's answer (a level's deferral
            still uses the speed bound alone). On by default: route mismatch on those
            drives (80 per case, seeds 31 and 77) falls by 0.1-0.4 points at 5-30 s on the
            random walk and by 0.6-0.8 on routed trips (Helsinki, seed 31); final and live
            answers unchanged but for a fix or two whose stretch now starts at a break
            (docs/measured.md, "Session 8: sparse15").
        stand_loops: a committed path that leaves a vertex and comes back to it by a
            loop holding a U-turn, while the fixes matched inside the loop span at least
            10 s and all lie within eps of that vertex, is committed as standing at the
            vertex (:meth:`livematch.core.tracker.Tracker._close_stand_loops`; the
            certificate still holds). While a vehicle stands at a junction its GNSS error
            leans to one side for tens of seconds, and the path cost, which counts each
            fix's error as independent, lets "into a short branch on that side, U-turn at
            its end, back" beat standing at the junction; once the vehicle leaves, every
            candidate descends from that detour. A loop the fixes do not show is no
            evidence of movement. Live answers are unaffected.
        stand_commit_wait: candidates that agree are not committed until 10 s after the
            vehicle last stood (needs ``stop_turns``; :meth:`livematch.core.tracker.
            Tracker._into_stand`), so that one commit holds the whole of a loop made
            during a stand and ``stand_loops`` can cut it out (a commit made mid-stand
            can end inside the branch). While it holds, the fix-count lag
            (``max_lag_fixes``) forces no commit either (with ``stand_wait``), so a forced
            commit cannot cut the loop in two; ``max_lag_s`` still forces. On by default
            (session 9): on 40 routed-trip drives at 1 s (Helsinki, seeds 31 / 77) it
            added 0.45 / 0.25 points of final accuracy to ``stand_loops`` (more with
            ``stand_loops_outer`` and the lag held) but moved the live answer by -0.23 /
            +0.03 points (the live score looks back to the last commit, which now lies
            further back); docs/measured.md, "Session 9 (fleet1hz)".
        sparse_stand_wait: at more than ``gap_s`` between fixes, candidates that agree
            are not committed while the step into the newest fix or the step before it
            was slower than ``livematch.core.tracker.STOOD_MPS`` (the vehicle stood, or
            has just left a stand): so the commit that settles a stand also holds the
            step that leaves it, and ``stand_loops`` sees the whole of a loop "past the
            stand point, U-turn, back" that the GNSS error leaning ahead made the
            cheapest path. At 1 Hz the stand evidence is ``stand_commit_wait``'s; 15-30 s
            between fixes show a stand as a slow step, and a commit made at the step
            leaving it ended inside the loop. Forced commits (``max_lag_*``) still go
            on. On by default: on bench/accuracy.py's routed trips (``--sim trips``, 80
            drives, seeds 31 / 77, Helsinki) final accuracy at 15 s 0.956 / 0.957 ->
            0.966 / 0.966, at 30 s 0.936 / 0.945 -> 0.940 / 0.951; the random walk loses
            0.04-0.16 points (loops circled within one step read as slow steps); 1-10 s
            unchanged (docs/measured.md, "Session 9 (sparse)").
        stand_loops_outer: ``stand_loops`` closes the outermost loop first (from the
            earliest pass through a vertex to the latest return there) instead of the
            innermost: the stand is committed at the first vertex of the loops that the
            path reached before them, on road it drove on the way in. The innermost loop's
            vertex may lie inside a branch that only the wandering GNSS error entered (a
            mid-road turn-round beside a side road). The cost: at a junction with a
            stub, the stand may go to a shape point before the junction, within eps.
        vertex_in_segment: an answer at the very start of a segment (position 0: the
            vehicle has driven none of it) is reported at the end of the segment the
            path came in by, the same point, live and final; not the first fix of a
            stretch. At a stand just short of a branch the path later leaves by another
            way; the segment it came in by is on the driven path either way.
        reverse_turns: a gap step (more than ``gap_s`` between fixes) whose fixes went
            back the way the step before came (both steps at least 20 m, turning by more
            than 135 degrees; :meth:`livematch.core.tracker.Tracker._turned_round`) may
            turn round in the street, as a step leaving a stop may (needs
            ``stop_turns``; charged ``street_turn_cost`` the same way). A van that
            dwells at a plain point of a road and leaves the way it came is seen by one
            fix during the dwell, or none, at 15-30 s between fixes, so no step is slow
            enough for ``stop_turns``; the bridge then took it on to the next junction
            and back, and committed the dwell on road past it never driven. Not when a
            dead end lies ahead of the reversing fix within what the vehicle could have
            driven to and back from in the step (:meth:`livematch.core.tracker.Tracker.
            _dead_end_ahead`): then the reversal is taken for the dead end's own turn.
            Off by default: on bench/accuracy.py's routed trips (``--sim trips``, 80
            drives, seeds 31 / 77) it gains final accuracy and route mismatch at 30 s,
            but on the random walk at 30 s (which reverses inside dead ends, and for which
            a turn in the street short of the end is the cheaper route) route mismatch
            still rises 0.2-0.35 points on seed 77 with the dead-end check (0.5-0.6
            without it) (docs/measured.md, "Session 10 (sparse30)" and "Session 10
            (reverse2)").
        reverse_turns_near: ``reverse_turns``' evidence (a gap step whose fixes went back
            the way the step before came, no dead end ahead within reach:
            :meth:`livematch.core.tracker.Tracker._turned_round`, :meth:`livematch.core.
            tracker.Tracker._dead_end_ahead`) opens a turn in the street at one place
            only: the vertex where each live state's segment ends, when it lies within
            eps of the reversing fix (:func:`livematch.core.sweep.bridge_step`; charged
            ``turn_back_cost`` plus ``street_turn_cost`` where the network has no
            U-turn). A van that dwelt at a plain point of a road and left the way it
            came turned where its dwell fix was; ``reverse_turns`` lets the bridge turn
            at any vertex of the street, which also gives a walk that came back round a
            block, or past the end of a dead end, a shorter route never driven (most
            reversals of the random walk are not turns; docs/measured.md, "Session 10
            (reverse2)"). No effect with ``reverse_turns`` on (which opens more). Off by
            default: on bench/accuracy.py's drives (80, seeds 31 / 77) the routed trips
            gain at 30 s (final +0.16 to +0.61 points, route mismatch -0.2 to -0.9), but
            the random walk still loses at 30 s (test extract final -0.20 / -0.08 points,
            route mismatch +0.19 / +0.05; Helsinki seed 77 +0.31), about as with
            ``reverse_turns``: its loss is turns at the reversing fix itself
            (docs/measured.md, "Session 11 (sparse3)").
        lone_reverse_turns: ``reverse_turns_near``'s turn at the reversing fix, opened
            only for a lone reversal: the fixes did not go back the way they came at any
            fix of the 180 s before (:meth:`livematch.core.tracker.Tracker.
            _lone_reversal`). A van turns round in the street where it dwelt, trips
            minutes apart; a vehicle whose fixes reverse again within minutes is
            circling or looping round blocks and dead ends, where the turn at the
            reversing fix is the cheaper route never driven (the random walk's loss
            under ``reverse_turns_near``). And only when the mean speed of the two steps
            round the reversing fix is at most ``REVERSE_TURN_MPS`` (7.5 m/s; :meth:`livematch.
            core.tracker.Tracker._slow_reversal`): a vehicle slows or stops to turn round,
            while an outlier fix also makes the fixes reverse, with two long, fast steps,
            and a turn at it kept the outlier (docs/measured.md, "Session 13
            (sparse30b)"). No effect with ``reverse_turns`` or ``reverse_turns_near`` on.
            The dead-end check then searches on from the live answer (held at a junction
            or not), so a dead-end spur off the junction where the answer sits counts
            (:meth:`livematch.core.tracker.Tracker._said_segment`). On by default: on
            bench/matcher_ab.py's decision runs it gains or leaves every cell unchanged
            (docs/measured.md, "Session 13 (spur058)").
        hold_filtered: a fix the filters refuse (``impossible_jump``, ``low_accuracy``)
            gets a live answer too: the newest live answer again, at the refused fix's
            time, with its certificate, while that answer is at most ``gap_s`` old
            (:meth:`livematch.core.tracker.Tracker._say_held`). A refused fix says nothing
            about where the vehicle is, but the vehicle is still there; without it the
            fix had no live answer at all (about 1 % of fixes with the simulator's
            outliers). Final answers are unchanged. On by default: ``assignments.jsonl``
            then holds a line per fix with a live answer, refused fixes included (marked
            ``"held": true``; the refusal is still counted by reason); off, a line per
            accepted fix only, as before.
        stand_at_vertex: a committed stand just past a vertex is reported at the vertex:
            where the path enters a segment from a vertex V and the fixes matched on that
            segment from the entry on span at least 10 s and all lie within eps of V (as
            does the fix before them), they are reported at V, as the end of the segment
            the path came in by (:meth:`livematch.core.tracker.Tracker._stand_at_vertex`;
            the path and the certificate are unchanged). While a vehicle stands its GNSS
            error leans one way for tens of seconds and the best path follows it a few
            metres onto the road beyond V; when the vehicle then leaves another way (the
            way it came after a turn in the street, read as a trip round the block, or
            the log ends during the stand), the stand was committed on a road it never
            drove. ``stand_loops`` cuts such a stand out only when the path comes back
            to V in the same commit. Final answers only; live answers are unaffected.
            Only where the stand's fixes come at most 5 s apart (median gap;
            ``livematch.core.tracker.SPARSE_S``) and wander (median step at least 0.1 m,
            ``STILL_M``: fixes that repeat one position, as in a noise-free log, show no
            drift for the path to have followed); never at the end of the segment a new
            stretch began on, nor after a loop out of V and back into it. On by default:
            on bench/accuracy.py's drives (80 per case, seeds 31 / 77, ``--intervals
            1,5``, both extracts, routed trips and random walk) final accuracy rises on
            routed trips by 0.3-0.6 points (Helsinki 1 s 0.9737 / 0.9632 -> 0.9772 /
            0.9673) and falls in no case; live answers and route mismatch are unchanged;
            at 15 and 30 s it cannot act (docs/measured.md, "Session 12 (standguard)").
        live_keep: hysteresis of the live answer (score units, 0 disables): when a live
            candidate of the deciding level lies on the segment of the previous live
            answer and ranks within ``live_keep`` of the best one (live score, see
            ``error_tau_s``; path cost when that is off), the live answer stays on it
            (:meth:`livematch.core.tracker.Tracker._keep_segment`). GNSS error is
            correlated in time: a lean of a few metres towards a side road, a parallel
            road or the other carriageway makes the candidate there rank best by a small
            margin for a few fixes, and without it the live answer jumps there and back.
            Any live candidate of the deciding level carries the same certificate.
            Only while fixes come at most 5 s apart (``livematch.core.tracker.SPARSE_S``):
            sparser, the vehicle passes several segments per step and staying on one
            means standing or turning back. Nor against a best candidate on the reverse
            of that segment (a turn round is motion, not a lean). Off by default: with 15,
            on bench/accuracy.py's 80-drive runs (seeds 31 / 77, both extracts) live
            accuracy on the routed trips (``--sim trips``) rose 0.2-1.1 points at 1-5 s,
            but on the random walk it fell 0.01-0.37 points; 15 s unchanged, final
            answers and route mismatch identical (docs/measured.md "Session 11
            (livemove)"). For fleets like the routed trips, 15.
            Commits and final answers are unaffected (the forced-commit tie-break reads
            the live answer's segment, as before).
        live_keep_stand_s: with ``live_keep``, hold the live answer only while the
            vehicle stands: the accepted fixes of the last ``live_keep_stand_s`` seconds
            all lie within 2 ``sigma_m`` of the newest one
            (:meth:`livematch.core.tracker.Tracker._stood_for`); 0 (the default) holds it
            while moving too. Why: the random walk's losses under ``live_keep`` are a
            lag while moving (the answer kept on the old road after a true turn onto a
            branch or a road alongside). Off by default: with 10 s and ``live_keep``
            15, on bench/accuracy.py's 80-drive runs (seeds 31 / 77, both extracts,
            1 and 5 s) the random walk still lost live fixes in three cells (-2 to
            -16 fixes), the fleet model gained 0.05-0.37 points at Helsinki (under
            half the unbounded gain) but lost 1-4 fixes on the test extract at 5 s
            (docs/measured.md "Session 12 (livepick)").
        motion_step: the motion term's scale shrinks with the time step as the error of
            a fix-to-fix step does: ``motion_m`` times ``sqrt(2 (1 - rho))``, rho =
            ``exp(-dt / error_tau_s)``, capped at ``motion_m`` (no change when
            ``error_tau_s`` is 0). Why: GNSS error that is correlated in time
            (first-order Gauss-Markov, variance sigma^2, autocorrelation rho) leaves a
            step between two fixes with error variance 2 sigma^2 (1 - rho), far below
            the fixes' own; a fixed ``motion_m`` weighs that accurate step like the
            biased positions. On a small loop (85 m circled at 19 m per 5 s fix) the
            distance term then reads a lap as standing or going round the other way
            where the fixes lean 10 m to one side (docs/measured.md "Session 12
            (laps5)").
        stand_short_m: with ``stand_at_vertex``, the stand's run may reach past the
            middle of a segment S shorter than this (metres; 0, the default, keeps the
            middle-of-segment guard everywhere): its far end lies within this of V, so
            "the vehicle stood at the far end instead" and "it stood at V" are both
            within GNSS error of the fixes, and the best path, dragged by an error that
            leans one way for tens of seconds, often ends the stand at the far end of a
            short S that the vehicle never drove (it turned round at V or left by
            another road; :meth:`livematch.core.tracker.Tracker._short_run_end`).
            Reported at V as the end of the road the path came in by, such a stand is on
            the driven path whichever end the vehicle stood at. Only while the longer
            run's fixes stand (within 2 ``sigma_m`` of its last): a vehicle circling a
            small turning circle keeps its fixes within eps of one vertex while moving.
            Off by default: at 5 m (``sigma_m``), on bench/fleetmiss.py's decision runs
            (80 drives, seeds 31 / 77, both extracts, 1 and 5 s, routed trips and random
            walk) final road+dir rises on routed trips at Helsinki (1 s 0.9772 / 0.9673
            -> 0.9775 / 0.9683) and falls nowhere, live answers and route mismatch are
            unchanged, but the error median rises by up to 0.023 m in seven cells (the
            stand reported at V where the vehicle stood at W); at 10 m the random walk
            and a test-extract trips cell lose fixes (docs/measured.md "Session 13
            (fleet1)"). For fleets that turn round at stops, 5.
        break_rejoin: where a commit cannot be joined to the last committed point (no
            route within the speed bound and ``join_detour``), and the tree committing
            it has its own answer for that same last fix, the committed path goes on
            from that answer by the tree's own route into the commit's first fix,
            instead of starting afresh at the first fix's segment. The published path
            still jumps there (from the last committed segment back to the tree's), but
            the route the tree matched between the two fixes is no longer left out.
            Why: at a break the route between the two fixes is lost from the committed
            path even where the tree that goes on matched it (in the case looked at,
            the last stretch ended 13 m into a branch not taken and the join round to
            the next commit was over ``join_detour``; docs/measured.md "Session 13
            (rmf5)"). Only the committed path changes (and a commit that now goes on
            no longer moves its first fix from a segment's very end to the next one).
        stand_turnback: where the committed path leaves a vertex A and comes back into
            it by a loop without a U-turn (a turning ring at a street's end, a short
            block), and inside the loop the vehicle stood at a vertex V of it (the nodes
            matched at or past V begin with a stand: fixes within eps of V for at least
            10 s, dense, wandering, their first 10 s within 2 ``sigma_m`` of each other),
            while every later fix matched on the loop lies within eps of the way back
            from V to A along the twins of the segments A -> V (met in order), the loop
            is committed as "to V, turn round, back to A": the stand's fixes at V, the
            later ones on the way back, the path after A unchanged
            (:meth:`livematch.core.tracker.Tracker._turn_back_at_stand`; the
            certificate still holds). Why: going round the ring costs no U-turn while
            turning round at V does, so a van that dwelt at V and left the way it came
            was committed round the ring on roads it never drove; the fixes cannot tell
            the two apart, and the stand shows where it was. Not over a one-way segment,
            nor where the way back is longer than the rest of the loop or fits the later
            fixes worse than the loop by more than ``turn_back_cost``, nor on a loop
            over a road the map draws twice; only where the loop's fixes come at most
            2 s apart (median; ``livematch.core.tracker.TURNBACK_GAP_S``: at 5 s a stop
            at a corner of a ring round a narrow island, then on round it, read as a
            turn back); final answers and the committed path only. On by default
            (session 15): on bench/fleetmiss.py's decision runs (80 drives, seeds 31 /
            77, both extracts, routed trips and random walk, 1 and 5 s) final road+dir
            rises in six of eight 1 s cells (test extract routed trips 0.9872 / 0.9906
            -> 0.9879 / 0.9918) and falls in none, route mismatch falls or stays, live
            answers are unchanged, and the 5 s cells are unchanged (docs/measured.md,
            "Session 14 (standv)" and "Session 15 (ringv)").
        speed_laps: where the fixes report their speed over ground (the optional
            ``speed`` of a position message), the committed path gets the laps of a
            small loop that the fixes cannot show. Between two consecutive committed
            fixes the vehicle drove about the mean of their two reported speeds times
            the time between them; the path's route between the two answers may be
            shorter. That shortfall, less a fifth of the distance as slack, is summed
            from fix to fix while it lasts (as a one-sided CUSUM, Page 1954), and once
            it holds a whole lap of the shortest loop that leaves a vertex of the route
            and comes back to it (no U-turn but at a dead end, so in and out of a short
            spur is a lap too), lying wholly within the smallest eps of one of the two
            fixes, that many laps are put in the path there and taken off the sum
            (``Tracker._with_laps``, :func:`livematch.core.routing.small_loop`). Why: a
            vehicle going round a loop or in and out of a spur smaller than the GNSS
            error sends fixes that a stand or a U-turn fits as well as the laps, and
            the route between answers is the shortest, so the laps are lost from the
            committed path (docs/measured.md "Session 13 (rmf5)": half the "laps" cause
            of the random walk at Helsinki 5 s is a 10 m dead-end stub driven in and
            out again and again); the distance driven is the evidence the positions
            lack, and a lap within eps of a fix keeps the certificate (the trace point
            stays while the path goes round). Only between fixes at most ``gap_s``
            apart (1-10 s with the defaults). Only the committed path changes; without
            reported speeds it does nothing.
        end_stand: at the end-of-log flush (and eviction), a vehicle whose last fixes
            stand (span at least 10 s, all within 2 ``sigma_m`` of the last, fixes at
            most 5 s apart and wandering: their median gap and step) is reported on the
            segment the committed path had reached at the first fix of that stand: each
            later fix at the point of that segment nearest it (never behind the one
            before). Only the final answers move: the committed path is kept, and so is
            an answer another rule placed off its node's segment
            (:meth:`livematch.core.tracker.Tracker._end_stand`). Why: while the vehicle
            stands its GNSS error leans one way for tens of seconds and the best path
            follows it past the vertex ahead onto a road not driven; in the middle of a
            log the fixes after the stand tell which way the vehicle left, at the end
            of the log nothing does, and the segment the stand began on is the one the
            fixes show it on. At 15 or 30 s between fixes two fixes within 10 m are no
            evidence of a stand (a turning circle, a slow step), so it acts there only
            with ``end_stand_sparse``.
            On by default: on bench/fleetmiss.py's decision runs it gains final road+dir
            at 1 and 5 s in every cell, loses no fix, and leaves live answers and route
            mismatch unchanged (docs/measured.md "Session 14 (endstand2)").
        start_stand: at the first commit of a vehicle's log, a vehicle whose first fixes
            stand (span at least 10 s, all within 2 ``sigma_m`` of the first, fixes at
            most 5 s apart and wandering: their median gap and step) and whose commit
            goes on past the stand is reported on the segment the committed path is on
            at the last fix of that stand, the road it left by: each earlier fix at the
            point of that segment nearest it (never ahead of the one after), and the
            committed path begins on that segment
            (:meth:`livematch.core.tracker.Tracker._start_stand`). Why: a log that begins
            while the vehicle stands at a vertex has no road it came in by, and the GNSS
            error, leaning one way for tens of seconds, draws the best path onto a short
            road into or out of that vertex that the vehicle never drove; only the
            departure shows where it was. Never at 15 or 30 s between fixes. On by
            default: on bench/fleetmiss.py's decision runs (80 drives, seeds 31 / 77, both
            models, both extracts, 1 and 5 s) it turns 2 to 73 fixes right in each routed
            trips cell and 2 to 10 in two random-walk cells, loses no fix, leaves live
            answers unchanged and route mismatch unchanged or lower (routed trips test
            1 s seed 31 1.98 -> 1.87 %) (docs/measured.md "Session 15 (logstart)").
        end_stand_sparse: ``end_stand`` also where the stand's fixes come more than 5 s
            apart (their median gap; 15-30 s feeds), but only when the committed path
            itself barely moved over the stand: its route from the stand's first fix to
            the last is at most 2 ``sigma_m`` long (:meth:`livematch.core.tracker.
            Tracker._short_sparse_stand`). Two fixes 15-30 s apart within 10 m of each
            other are as often a vehicle that went round a small loop or a turning circle
            between them as one that stood; the best path tells the two apart, as it goes
            round the loop in the first case and steps a few metres past the vertex in
            the second (the GNSS lean that ``end_stand`` undoes). Why: at 30 s between
            fixes the HMM peer (which takes a fix within 2 sigma of the one before as no
            new step) is right at the last fix of a log that ends in a stand where
            livematch's flush answers the road past the stand's vertex (docs/measured.md
            "Session 15 (hmm30)"). Needs ``end_stand``. Final answers only. On by
            default: on bench/matcher_ab.py's decision runs (80 drives, seeds 31 / 77,
            both models, both extracts, 15 and 30 s) it turned 1-8 final answers right
            per routed-trip cell and none wrong, live answers and route mismatch
            identical; at 1-5 s it cannot act.
        bridge_error_corr: in a bridged step over more than ``gap_s`` seconds, the
            distance term charges the part of the fix's offset from the matched point
            that the parent's offset at the fix before does not explain:
            |e1 - rho e0|^2 / (2 sigma^2 (1 - rho^2)), rho = exp(-dt / ``error_tau_s``),
            the conditional density of first-order Gauss-Markov error (no change when
            ``error_tau_s`` is 0; :func:`livematch.core.sweep._offer`). Why: the path
            cost counts fixes 15-30 s apart as independent, while GNSS error wanders over
            tens of seconds (Ranacher et al., IJGIS 2016): an error leaning towards a road
            alongside the driven one for minutes makes that road cheaper at every fix,
            and switching onto it costs only its short link. Under the conditional term
            the switch costs the sudden change of offset. Steps of at most ``gap_s`` (the
            sweep) are unchanged; so is the live score's own rescoring.
            Off by default (docs/measured.md "Session 15 (walk15)").
        stand_way_out: where the committed path leaves a vertex V by a segment S, the
            vehicle stood at V (the first fixes matched past V within eps of V for a
            stand: 10 s, dense, wandering, their first 10 s within 2 ``sigma_m`` of each
            other; the fix before them within eps of V) and the path reaches a later
            vertex B within 120 m, another way from V to B that does not begin with S
            is taken where it fits the fixes after the stand up to B better than the path
            by more than one unit of the path cost's distance term; every fix from the
            stand to B is then committed on that way where it projects (in order, each
            within eps), the path before V and after B unchanged
            (:mod:`livematch.core.wayout`; the certificate still holds). Why: a stand's
            error leans as a whole for tens of seconds, and the path cost, which charges
            each fix as independent, takes a side road out of V that the lean follows
            and that joins the driven street again a few metres on; the stand's fixes
            show where the vehicle was, not which road it left by, the fixes after it
            do. Final answers and the committed path only; it cannot act where the
            stand's fixes come more than 5 s apart (median). On by default (session
            16): on bench/fleetmiss.py's decision runs (80 drives, seeds 31 / 77, both
            extracts, routed trips and random walk, 1 and 5 s) it changes one cell,
            routed trips Helsinki 1 s seed 77 (final road+dir 0.9804 -> 0.9814, +70 / -0
            fixes, route mismatch 2.247 -> 2.207 %), and leaves the other fifteen as they
            were (docs/measured.md "Session 16 (outofv)").
        stand_pace: in a bridged step over more than ``gap_s`` seconds whose two fixes
            lie within 2 ``sigma_m`` of each other (the vehicle stood through the step;
            :func:`livematch.core.tracker.stand_step`), the pace term
            (:func:`livematch.core.sweep.pace`) charges nothing (the search still reaches
            as far as without it), and the step may turn round at a vertex within eps
            of its first fix, charged ``turn_back_cost`` only, without
            ``street_turn_cost`` (where ``stop_turns`` has not already opened every
            vertex, which keeps its charge). Why: at 30 s between fixes a van that
            arrives, dwells in the middle of a road and leaves the way it came is
            committed as driving on to the next junction or dead end and back during the
            dwell, on road it never drove: the pace term expects each candidate to go on
            at its own last speed (so standing costs and the trip does not), and no turn
            is open where it stood until the step after a slow one. The HMM peer, which
            charges no U-turn and no pace, has those fixes right (docs/measured.md
            "Session 15 (hmm30)"). Off by default: on the decision runs it gained on one
            routed-trips seed and lost on the other (docs/measured.md "Session 16
            (dwell30)").
        bridge_error_cross: as ``bridge_error_corr``, but the offsets are correlated
            across the road only: the new offset's part across its segment is charged
            given the parent's offset across the parent's own segment, and its part
            along the segment (where a clamped matched point sits off the fix's
            projection, at a junction) keeps the independent term
            (:func:`livematch.core.sweep._cross_term`). Why: near a vertex the 2-D offset
            of ``bridge_error_corr`` is a distance to the vertex, so the term reshuffled
            junction answers both ways; the lean towards a road alongside is across the
            road. Takes precedence over ``bridge_error_corr``. Off by default
            (docs/measured.md "Session 16 (walkloop)").
        speed_pace_m: where the new fix reports its speed over ground (the optional
            ``speed`` of a position message) and the step from the fix before is longer
            than ``gap_s``, the bridged step's pace term, for every candidate, charges a
            route only for falling short of the least distance the speeds say was driven
            (0.8 times the slower of the two fixes' speeds times the time between them;
            the new fix's speed where the fix before reported none, and in the spike
            test's step that leaves a fix out), at one unit per this many metres, instead
            of comparing the route with the candidate's own last speed (0, the default,
            leaves the pace term as it is). One-sided and from the slower end: a vehicle
            that stopped or slowed within the step drove less than either speed says,
            and must not be pulled round a block (the two-sided trapezoid lost up to 4
            points at 30 s). Off by default: on the decision runs (speeds reported with
            0.2 m/s error) it gains every random-walk 15 s cell run but loses at 30 s and
            on routed trips at Helsinki 15 s (docs/measured.md "Session 16 (walkloop)").
            Why: at 15 s between fixes a vehicle circling a small loop of perimeter P at
            d metres per step, P/2 < d < P, puts its fixes where the other
            direction round the loop puts them at P - d per step, a shorter route the
            route-against-chord term prefers at every step; each candidate's own pace is
            self-consistent either way, so only a speed that does not come from the
            path can tell the two apart (docs/measured.md "Session 16 (walkloop)").
            The detour bound of the step is raised to that route where it is longer.
        smallest_commits: when the trees that covered the oldest pending fixes died and
            their best candidate is committed (a salvage), the commit stops before the
            first fix that a smaller live level's younger tree covers; that level settles
            the rest when its own candidates agree, so each fix is settled by the
            smallest level whose tree covers it, as the ladder intends
            (:meth:`livematch.core.tracker.Tracker._smallest_top`). Why: when the small
            levels die at a stand or a turn and restart, the 60 m level alone covers the
            oldest fixes; its best path need not turn round at all (every fix of a 40 m
            out-and-back lies within 60 m of where it came in), and when that tree dies
            too its salvage settled every fix up to its best leaf, also the ones the
            15 m level's new tree answers within 15 m: answers 37-55 m from their fixes
            (docs/measured.md "Session 16 (fleet5)"). On by default (session 16): on
            bench/fleetmiss.py's decision runs (80 drives, seeds 31 / 77, both
            extracts, routed trips and random walk, 1, 5 and 15 s) live answers are
            identical everywhere and final answers change in four cells, none for the
            worse: routed trips Helsinki 5 s (+12 / -0 and +2 / -0 fixes), test 5 s
            seed 31 (+1 / -0) and test 1 s seed 77 (+18 / -0; route mismatch 1.456 ->
            1.444 %).
        start_roots: when the first commit of a vehicle's log is due (its tree started
            at the oldest fix not committed), the fixes are swept again from each
            segment within eps of the first fix alone; when the root of the best
            candidate does not get through that way (the tree bridged a step) and other
            roots do, the best of those by live score (the forced commit's rule at
            such fixes) becomes the tree's only root and the commit is decided on it
            (:mod:`livematch.core.startroots`). Only while fixes come less than 5 s
            apart (median): at 15 or 30 s a tree bridges as a matter of course.
            Why: a log that begins beside a parallel road has both roads as roots, and
            the sweep's one state per segment can leave every candidate descended from
            the wrong root, on a lineage that needs a bridge where the road driven,
            swept alone, stays within eps. Final answers, the start of the committed
            path, and the live answers after the rebuild. On by default: on
            bench/fleetmiss.py's decision runs (80 drives, seeds 31 / 77, both models,
            both extracts, 1 / 5 / 15 / 30 s) it turned 87 fixes right in routed trips
            Helsinki 1 s seed 31 and none wrong; every other cell unchanged
            (docs/measured.md "Session 16 (movestart)").
        flush_scored: the end-of-log flush (and eviction) commits the candidate with the
            lowest live score (see ``error_tau_s``), as a forced commit does, instead of
            the lowest path cost, while the pending fixes come less than 5 s apart (their
            median step; :meth:`livematch.core.tracker.Tracker._flush_scores`). Why: at
            the end of a log nothing can make the candidates agree any more, and the path
            cost, which counts each fix's error as independent, commits the branch a GNSS
            error leaning one way over the last tens of seconds favours (a road out of
            the junction where the vehicle stands, a road alongside), where the live
            answer, ranked by the live score, was on the road driven. Final answers of
            the flushed fixes and the end of the committed path only. Off by default.
        end_stand_centre: with ``end_stand``, the stand at the end of the log is the
            longest run of the last fixes within 2 ``sigma_m`` of the run's centre (the
            median of the fixes), not of the last fix, where those fixes come at most
            5 s apart (median) and wander
            (:meth:`livematch.core.tracker.Tracker._stand_from_centre`). Why: the last
            fix of a stand lies anywhere in its scatter, and measured from it one fix on
            the far side ends the stand early, on the road past the vertex that the drift
            led onto. Final answers of the flushed fixes only. On by default: on
            bench/fleetmiss.py's decision runs (80 drives, seeds 31 / 77, routed trips
            and random walk, Helsinki and test extracts, 1 and 5 s; it cannot act at 15
            or 30 s) it turned 105 fixes right and none wrong, live answers and route
            mismatch unchanged in every cell (docs/measured.md "Session 18 (fleet5c)").
        heading_cost: where a fix reports its heading (the optional ``heading`` of a
            position message: a receiver's course over ground, a phone's bearing,
            GTFS-realtime's ``bearing``; degrees clockwise from true north), every
            candidate state at that fix is charged for its directed segment pointing
            away from it: this many units (the same units as the other terms) times
            ``1 - exp(-d^2 / (2 s^2))``, ``d`` the angle between the segment and the
            heading compared in the network's grid (the heading turned by the meridian
            convergence at the fix), ``s`` = :data:`livematch.core.heading.HEADING_SPREAD_DEG`
            (:mod:`livematch.core.heading`); a state less than 2 ``sigma_m`` into its
            segment pays the lesser of that and the charge of the segment its route
            came by, and every charge is taken less the least one at the fix
            (:func:`livematch.core.heading.state_charges`). 0, the default, is off:
            outputs are those of a tracker without the rule, with or without headings.
            The charge is added after the step, to the states as the step made them
            (segment, position, and the route in of the parent each kept): it changes
            no back-pointer of the step that adds it, and never what is reachable (the
            Fréchet decision and its certificate); it
            orders the candidates the decision keeps, in every later ranking (best
            candidate, live score, forced and flushed commits, the parents a later
            step, swept or bridged, keeps). A heading is ignored where the fix also
            reports a speed below :data:`livematch.core.heading.HEADING_MIN_MPS`
            (a course at a stand is noise). Why: the direction of travel is what
            positions cannot give where the two directions of one road fit the fixes
            alike: a drive into a dead end and out between two fixes, a turning loop
            read the wrong way round, the first fix of a log (docs/measured.md
            "Session 18 (heading)"). Off by default: on the decision runs (80 drives,
            seeds 31 / 77, both models, both extracts, 1 / 5 / 15 / 30 s, headings
            simulated with 5 degrees of error) 5 gains live, final and route mismatch
            in 29 of 32 cells (random walk Helsinki 15 s final 0.9195 -> 0.9592) but
            routed trips on the test extract at 1-5 s lose route mismatch in three
            (up to 1.64 -> 1.76 %) and final in one (0.9922 -> 0.9918).
        start_way_out: at the first commit of a vehicle's log, a first fix answered on
            a segment the path leaves before the next fix, short of that segment's end
            vertex V (not at its start vertex), with V within the smallest eps level of
            the fix and the next fix 5 s or more later, is reported at V on the segment
            the path enters there; the committed path keeps the segment into V
            (:meth:`livematch.core.tracker.Tracker._start_way_out`). The way out is never
            read from a fix the spike test has not judged: a first commit that would
            read it from such a fix alone waits one fix. Why: nothing before the first
            fix shows how the vehicle came to V; the segment out of V is driven either
            way, the one into it only if the vehicle came in by it rather than standing
            at V when its log began; an outlier as the second fix draws every candidate
            out of V towards it. The final answer of the first fix only. On since
            session 19: on bench/fleetmiss.py's decision runs (80 drives, seeds 31 / 77,
            both models, both extracts, 5 / 15 / 30 s) it turns 12 to 28 fixes right net
            in every random-walk cell (Helsinki 15 s 0.9195 / 0.9334 -> 0.9248 / 0.9373,
            30 s 0.9040 / 0.9073 -> 0.9117 / 0.9161; test 30 s 0.9286 / 0.9407 ->
            0.9339 / 0.9492) and 0 to 5 in routed trips, none net wrong; live answers
            and route mismatch identical in all 24 cells. The matched-position error
            median moves by -0.044 to +0.053 m (the answer at V, not the fix's
            projection on A; no target at 5-30 s). docs/measured.md "Session 18
            (logstart)" and "Session 19 (logstart2)".
        stand_loops_sparse: ``stand_loops`` also for a loop whose fixes span less than
            10 s, where fixes come more than 5 s apart (``livematch.core.tracker.
            SPARSE_S``, the median gap from the node before the loop), the whole loop
            lies within eps of its vertex (every vertex of it does; a disc is convex), so
            that no fix could show the detour, and the step into the loop's first fix or
            out of its last is slower than ``livematch.core.tracker.STOOD_MPS`` (a stand,
            as sparse fixes show one; a vehicle that drove through at speed shows none),
            and every fix of the loop lies nearer its vertex than the vertex where the
            loop turns round (a van that stood there did drive there).
            Why: at 15-30 s a van that stands in the
            middle of a road and turns round shows one or two fixes at the turning point;
            the sweep may turn round only at a junction or a dead end (and at a plain
            point only in the step after a slow one, at a charge), so the path drives on
            to the next such vertex and back, and the stand's fix lands on the road past
            the turn, a road not driven. Newson & Krumm's transition (route length
            against the distance between the fixes, a U-turn anywhere for free) turns at
            the fix. What the rule gives up: a vehicle that drove into a branch shorter
            than eps and back between two fixes is committed as turning at its mouth
            (route mismatch only: every fix still lies within eps of its point).
            Commits only (final answers and the path); off by default.
        no_roll_back: in a sweep step (fixes at most ``gap_s`` apart), a candidate that
            stays on its segment is reported no earlier on it than its parent: the
            fix's projection is clamped into the reachable part of the free interval
            from the parent's position on (``floor`` of
            :func:`livematch.core.sweep._offer`); what is reachable, and so the
            Fréchet decision and its certificate, is unchanged. Why: over a stand at
            the end of a road the whole segment stays reachable, and the drive back
            along its twin afterwards lies on the same line; a lineage that never
            turns round answers it by sliding back along the segment it came in by,
            pays no U-turn charge, and so is the cheaper, until the fixes leave eps
            and the next commit does not join on (docs/measured.md "Session 18
            (fleet5c)", "on path, > 30 m"). Held at its parent's position, such a
            lineage pays the distance term for the drive back and the one that
            turned round wins. Off by default: on bench/fleetmiss.py's decision runs
            (80 drives, seeds 31 / 77, both models, both extracts, 1 and 5 s) live
            road+dir rises in 12 of 16 cells and the matched-position error median
            falls in all 16 (by 0.03-0.30 m), but final road+dir falls in 11 and route
            mismatch rises in 10; the largest losses are roads the map draws alongside
            the driven one, taken the other way (docs/measured.md "Session 19
            (fleet1hz)"). At 15 and 30 s every step is bridged and the rule cannot
            act.
        roll_back_slack_m: with ``no_roll_back``, a candidate may be reported up to this
            many metres behind its parent on the same segment (0, the default: not at
            all). At 3 m the rule barely acts (docs/measured.md "Session 19
            (fleet1hz)"): what it changes at 0 is mostly the fix-to-fix jitter, not the
            drive back.
        smallest_agrees: a level whose candidates agree leaves the commit to a smaller
            covering level (``Tracker._leaves_to_smaller``) where the larger level would
            otherwise commit, when three things hold: the smaller level's tree began
            before the last committed fix (it did not just restart), the fixes from the
            last committed one on are at most 5 s apart (``SPARSE_S``), and the fixes not
            committed are within the lag (``max_lag_*``). The smaller level then commits
            when its own candidates agree, or by a forced commit. Why: at 1 s, after a
            turn round at a dead end, a 30 m tree left with one candidate (a lineage
            that never turned, held at its lowest reachable point on the way in) agrees
            with itself at once and settles the fixes 8-29 m from them, where the 15 m
            level's candidates follow the fixes (docs/measured.md "Session 19
            (fleet1hz)"). Live answers are kept as without the rule: the deferred commit
            is remembered (``Tracker.agreed_seq``, checkpointed) and bounds the live
            score's window, the stand checks and the forced commit's lag as the commit
            would have. At 15-30 s it cannot act. On by default since session 21: on
            the decision runs (80 drives, seeds 31 / 77, both models, both extracts,
            1 / 5 / 15 / 30 s) live road+dir is the same in all 32 cells, final
            road+dir rises or stays in all 32 and route mismatch falls or stays in all
            32 (routed trips Helsinki 1 s 2.93 / 2.21 -> 2.34 / 1.80 %; the 15 and 30 s
            cells identical); docs/measured.md "Session 21 (agrees5)".
        monotone_final: a commit's final answers never go back along the committed path:
            read as distances along it (from the previous commit's last answer on,
            when the path joins on to it), they are replaced by their least-squares
            non-decreasing fit (pool adjacent violators,
            :func:`livematch.core.isotonic.isotonic_fit`), bounded below by the
            previous commit's last answer, and each fitted distance is clamped into
            its own answer's segment: which road every answer is on, the path and the
            live answers are unchanged, only the offsets and points of final answers
            move (:meth:`livematch.core.tracker.Tracker._monotone_final`). Why: a
            vehicle's true position only moves forward along the road it drives; the
            fit pools the jitter of a standing or slowly driving vehicle (the most
            likely monotone sequence under Gaussian error). Off by default.
        monotone_pool: with ``monotone_final``, no bound from the previous commit: the
            last block of its fit (mean and count) is pooled into the next commit's fit
            as one weighted value, so that the answers of a stand committed one or two
            fixes at a time (as at 1 Hz) are the running mean of the stand rather than
            ratcheted forward by the bound to the most forward jitter so far; answers
            may then go back across a commit boundary (by less than without the
            rule). Off by default.
        end_at_vertex: at the end-of-log flush (and eviction), where the fixes come more
            than 5 s apart (their median gap over the log's last fixes: 15-30 s feeds),
            the last fixes of the log that the committed path matched just past a vertex
            V, on the segment S it entered from V last (coming in by P, not S's twin),
            each fix within eps of V and matched nearer V than S's far end, are reported
            at V as the end of P (:meth:`livematch.core.tracker.Tracker._end_at_vertex`).
            Only those final answers move: the path (which goes on onto S), the live
            answers and every answer another rule placed are kept. Why: at 30 s between
            fixes a vehicle that reaches V and stands there, or turns round there, after
            the log ends sends its last one or two fixes near V, and the GNSS error leans
            them a few metres onto one of V's roads out; with no later fix nothing tells
            which road out, or whether any, while P is on the driven path either way
            (docs/measured.md "Session 22 (test30)": the "end" misses of the routed trips
            at 30 s that the HMM peer has right). Two fixes near V are needed (the run's
            own, or its one fix and the fix before it): one fix near V is also what a
            vehicle driving through V sends, and then P, guessed between two sparse
            fixes, is no better than S. ``end_stand`` needs a stand of 10 s and acts on
            the segment the stand began on; this rule acts on the road into V. It
            cannot act where the fixes come at most 5 s apart. On by default: on
            bench/fleetmiss.py's decision runs (80 drives, seeds 31 / 77, both models,
            both extracts, 1 / 5 / 15 / 30 s) it turns 2-16 final answers right in seven
            of the eight routed-trips cells at 15-30 s and 2 in one random-walk cell,
            loses none in net (one random-walk cell +1 / -1), and leaves live answers
            and route mismatch identical in all 32 cells.
        stub_turn_m: a U-turn the committed path makes at a vertex V that is not a
            dead end, where exactly one other way out of V is a stub (two-way segments
            through plain shape points to a dead end, at most this many metres in all),
            is committed as a turn at the stub's end: the stub's segments there and
            back go into the path between the way into V and the way back
            (``Tracker._turns_in_stubs``), unless the fixes next to the turn that lie
            within eps plus ``STAND_SIGMAS`` x ``sigma_m`` of V span ``STAND_S``
            seconds (``stand_loops``' test of a stand at a vertex, the radius widened
            by a stand's own spread: the vehicle stood there and may have turned where
            it stood, as the routed trips' vans do at a stop). Answers, live or
            final, do not move. Why: a stub no deeper than the GNSS error keeps every
            fix taken in it within that error of its mouth, so the fixes cannot show
            it (docs/measured.md "Session 21 (rmf)": in and out of such stubs holds a
            quarter of the random walk's route mismatch at Helsinki 5 s), while a
            vehicle moving through a junction turns round there by the room the stub
            gives it, not in the junction. 0 (the default) is off.
        off_network_m: the off-network radius, metres. A fix that no level of the ladder
            matches (every level's window died and no road lies within the largest eps
            to start afresh on) is filtered as ``no_road_nearby``, and the off-network
            monitor (``alerts.off_network_s``) counts from it, only when no road lies
            within this radius of it either; with a road within it, the fix is filtered
            as ``road_beyond_eps`` instead and is on the network (it has no answer, but
            it does not count toward ``off_network``). 0 (the default) is the largest
            eps: today's radius, and no query of its own. Otherwise at least the largest
            eps (a smaller radius would need a query at every matched fix). Why: the
            ladder's largest level is a matching radius, and a ladder without its 60 m
            level (less memory and CPU per vehicle, docs/measured.md "Session 25
            (lead)") would otherwise also shrink the off-network radius to 30 m; the
            extra query runs only for a fix every level refused (rare), so it costs
            nothing per matched fix.
        join_margin_m: the margin of the join limit, metres: where one candidate tree's
            commit follows another's, the route joining the two committed points is at
            most ``bridge_speed_mps`` x the time between them plus this
            (:meth:`livematch.core.tracker.Tracker._join_limit`); a longer join breaks the
            path there. 0 (the default) is twice the largest eps (each committed point
            may lie up to its level's eps ahead of or behind the vehicle: 120 m with the
            default ladder). Lets a ladder without its largest level keep the margin.
        filtered_pace: the final answer of a filtered fix (a spike, an impossible jump,
            poor reported accuracy) is placed along the committed path between its
            matched neighbours a and b by the distance a smooth drive covers by its
            time, not in proportion to time: a cubic Hermite curve of the distance along
            the path against time, from a at the speed of the committed step into a to
            b at the speed of the step out of b (each the route length over the step's
            time; where the commit holds no such step, the mean speed from a to b), the
            end speeds limited so that the curve never goes back (Fritsch & Carlson,
            SIAM J. Numer. Anal. 1980) (:func:`livematch.core.tracker._paced_share`).
            Only those final answers move; the path, the live answers and every other
            answer are unchanged. Why: such a fix's position is no evidence, only its
            time is, and at 15 s between fixes a dropped fix lies 30 s between its
            neighbours, over which the random walk and the routed trips slow down to
            stops and speed up again. Placed between its *true* neighbours at 15 s
            (``bench/spikefate.py --pace-oracle``, seeds 31 / 77, Helsinki, both drive
            models), proportional time puts 22-31 % of fixes 30 m or more from the
            truth along the path, this curve 15-17 %; at 30 s (60 s between the
            neighbours, speeds read over 30 s steps) it helps the routed trips (64 ->
            55 %) and not the random walk (50-54 -> 51-56 %). Off by default: on the
            decision runs the random walk at Helsinki 15 s gained 4 fixes on seed 31
            and lost 1 on seed 77, Helsinki 30 s seed 77 lost 3 (docs/measured.md
            "Session 26 (walk26)"); filtered fixes are about 1 % of a feed's.
        class_cost_m: a prior for the more important road where two roads fit the
            fixes alike: at every fix, each candidate state on a segment of a minor road
            class (ranked after ``residential`` in OpenStreetMap's highway order:
            ``living_street``, ``service``, ``road``, unlisted classes such as
            ``track``; :func:`livematch.core.network.minor_segments`) pays
            ``class_cost_m / beta_m``, the route term's charge for this many metres of
            route mismatch, unless every live state of its level at that fix is on a
            minor road (the charge is a ranking among the states, not a verdict on
            each; :func:`livematch.core.tracker._charge_class`). It is added after the
            step, like the heading charge: no back-pointer of that step moves and
            nothing reachable changes (the Fréchet decision and its certificate), so
            every answer still lies within eps of its fix; the parents later steps keep,
            the best candidate, the live score and every commit read it through the
            path cost. Why: a map draws a service road or a parking aisle a few metres
            beside a street (docs/measured.md, "Session 17 (fleet1hz)"); both stay within
            eps for minutes and the lean of the correlated GNSS error picks one. That
            vehicles spend more of their time on through roads than on service ways is
            a prior (common practice in map matching, not measured here). 0, the
            default, is off: outputs are those of a tracker without the rule. Off by
            default: the simulated drives pick their roads without regard to class, and
            on bench/fleetmiss.py's decision runs at 3 m it turned fixes right where the
            street was driven and wrong where the service road beside it was (routed
            trips Helsinki 1 s seed 31 final 0.9800 -> 0.9807, seed 77 0.9832 ->
            0.9821; the random walk Helsinki 1 s 0.9864 -> 0.9852 and 0.9884 -> 0.9871;
            docs/measured.md, "Session 28 (class28)").
        beam_margin: a cost beam over the levels above the smallest live one (the
            fallback while that one decides): after each fix, each such level drops its
            live states whose path cost exceeds its best state's by more than this
            (cost units: a fix's distance term is d^2 / (2 sigma_m^2));
            :func:`livematch.core.sweep.beam`, :meth:`livematch.core.tracker.Tracker._beam`.
            Never the smallest live level (it decides the live answer), nor the smallest
            level covering the oldest pending fix (a forced commit reads its best by
            live score), nor the best state. Dropping reachable states leaves every
            kept path within eps of its fixes (each certificate holds); the level can
            only die and start afresh sooner. Its candidates would agree sooner too:
            with the rule on, only the first covering level commits by agreement.
            Why: memory (issue 9): a driven vehicle's 60 m level holds about 21 live
            states and their ancestors, most of them far from the fixes
            (docs/measured.md, "Session 30 (beam30)"). 0, the default, is off. Off by
            default: at 20 with ``beam_keep`` 8 a driven 1 Hz vehicle held 7.93 KB instead
            of 10.19 (``bench/memory.py --steps 6,7``), but on bench/fleetmiss.py's
            decision runs final road+dir fell in all eight 1 s cells, by 0.02-0.21 points
            (random walk Helsinki seed 31 0.9864 -> 0.9843): where the vehicle stands
            and the fixes drift, the 15 m level dies and the thinned 30 m level it falls
            back to has dropped the road the vehicle came in by.
        beam_keep: with the same rule, each such level keeps at most this many live
            states, the first by cost (:func:`livematch.core.sweep.best_leaf`'s order).
            0, the default, is off.
        beam_guard: with the same rule, a thinned level keeps every live state whose
            segment is a live state's segment in the next smaller live level (after that
            one's own thinning, so by induction in every smaller live level): the
            fallback always holds the roads the level that decides still holds, the road
            the vehicle came in by among them when that level dies at a stand or an
            outlier (the losses of the rule without it: docs/measured.md, "Session 30
            (beam30)"). False, the default, is off.
        beam_moving: with the same rule, thin only while the vehicle moves: at a stand
            (``stand_seq``, kept by ``stand_hold``) no level is thinned, as a stand's
            drifting fixes are where the fallback is needed. False, the default, is off.
        beam_top: with the same rule, thin only the largest level, leaving the levels
            between whole as the first fallback; those, not thinned, commit by agreement
            as without the rule (only the largest is kept out). False, the default, is
            off. Off by default: with all three refinements on (margin 20, keep 8) a
            driven 1 Hz vehicle held 8.85 KB instead of 9.86 and the 1 s cells of
            bench/fleetmiss.py's decision runs no longer lost final answers, but 1-3
            fixes were lost in five 5-30 s cells (docs/measured.md, "Session 31 (beam31)").
        beam_max_gap_s: with the same rule, thin (and keep the thinned levels out of
            the commits by agreement) only at a fix at most this many seconds after the
            previous accepted one; after a longer gap (and at a vehicle's first fix) the
            fix is treated as without the rule. Why: the memory the beam saves is a
            frequent reporter's (a sparse vehicle's trees are shrunk and its state
            parked), while the answers it cost were at 5-30 s (docs/measured.md,
            "Session 31 (beam31)"); a vehicle reporting every 5 s or more is then
            matched exactly as without the beam.
            0, the default, is no gate (every fix thinned).
    """

    eps_levels: tuple[float, ...] = (15.0, 30.0, 60.0)
    max_lag_fixes: int = 60
    max_lag_s: float = 120.0
    max_speed_mps: float = 60.0
    max_accuracy_m: float = 150.0
    reorder_fixes: int = 0
    gap_s: float = 10.0
    gap_m: float = 150.0
    bridge_speed_mps: float = 40.0
    detour_factor: float = 2.0
    sigma_m: float = 5.0
    beta_m: float = 10.0
    turn_back_cost: float = 2.0
    motion_m: float = 5.0
    pace_m: float = 20.0
    junction_hold: float = 3.0
    junction_hold_m: float = 30.0
    error_tau_s: float = 30.0
    spike_cost: float = 30.0
    street_turns: bool = False
    stop_turns: bool = True
    street_turn_cost: float = 4.0
    stand_wait: bool = True
    stand_hold: bool = True
    pace_reach: bool = True
    join_detour: float = 2.0
    stand_loops: bool = True
    stand_commit_wait: bool = True
    sparse_stand_wait: bool = True
    stand_loops_outer: bool = True
    vertex_in_segment: bool = True
    reverse_turns: bool = False
    reverse_turns_near: bool = False
    lone_reverse_turns: bool = True
    hold_filtered: bool = True
    stand_at_vertex: bool = True
    live_keep: float = 0.0
    live_keep_stand_s: float = 0.0
    motion_step: bool = False
    stand_short_m: float = 0.0
    break_rejoin: bool = False
    stand_turnback: bool = True
    speed_laps: bool = False
    end_stand: bool = True
    start_stand: bool = True
    end_stand_sparse: bool = True
    bridge_error_corr: bool = False
    stand_way_out: bool = True
    stand_pace: bool = False
    bridge_error_cross: bool = False
    speed_pace_m: float = 0.0
    smallest_commits: bool = True
    start_roots: bool = True
    flush_scored: bool = False
    end_stand_centre: bool = True
    heading_cost: float = 0.0
    start_way_out: bool = True
    stand_loops_sparse: bool = False
    no_roll_back: bool = False
    roll_back_slack_m: float = 0.0
    smallest_agrees: bool = True
    monotone_final: bool = False
    monotone_pool: bool = False
    end_at_vertex: bool = True
    stub_turn_m: float = 0.0
    off_network_m: float = 0.0
    join_margin_m: float = 0.0
    filtered_pace: bool = False
    class_cost_m: float = 0.0
    beam_margin: float = 0.0
    beam_keep: int = 0
    beam_guard: bool = False
    beam_moving: bool = False
    beam_top: bool = False
    beam_max_gap_s: float = 0.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "eps_levels", tuple(float(e) for e in self.eps_levels))

    def problems(self) -> list[tuple[str, str]]:
        """Every invalid value as (key, what was expected, with the value found)."""
        out: list[tuple[str, str]] = []
        eps = self.eps_levels
        if not eps:
            out.append(("eps_levels", "must list at least one level, got []"))
        elif any(not math.isfinite(e) or e <= 0 for e in eps):
            out.append(("eps_levels", f"must be positive metres, got {list(eps)}"))
        elif any(b <= a for a, b in itertools.pairwise(eps)):
            out.append(("eps_levels", f"must be strictly increasing, got {list(eps)}"))
        positive = ("max_lag_s", "max_speed_mps", "max_accuracy_m", "gap_s", "gap_m",
                    "bridge_speed_mps", "detour_factor", "sigma_m", "beta_m",
                    "motion_m", "pace_m")
        for name in positive:
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
                out.append((name, f"must be a positive number, got {value!r}"))
        if not (isinstance(self.max_lag_fixes, int) and self.max_lag_fixes >= 2):
            out.append(("max_lag_fixes", f"must be an integer >= 2, got {self.max_lag_fixes!r}"))
        for name in ("turn_back_cost", "junction_hold", "junction_hold_m", "error_tau_s",
                     "spike_cost", "street_turn_cost", "join_detour", "live_keep",
                     "live_keep_stand_s", "stand_short_m", "speed_pace_m", "heading_cost",
                     "roll_back_slack_m", "stub_turn_m", "join_margin_m", "class_cost_m",
                     "beam_margin", "beam_max_gap_s"):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value >= 0):
                out.append((name, f"must be a number >= 0, got {value!r}"))
        for name in ("street_turns", "stop_turns", "stand_wait", "stand_hold",
                     "pace_reach", "stand_loops", "stand_commit_wait", "sparse_stand_wait",
                     "stand_loops_outer", "vertex_in_segment", "reverse_turns",
                     "reverse_turns_near", "lone_reverse_turns", "hold_filtered",
                     "stand_at_vertex", "motion_step", "break_rejoin", "stand_turnback",
                     "speed_laps", "end_stand", "start_stand",
                     "end_stand_sparse", "bridge_error_corr", "stand_way_out",
                     "stand_pace", "bridge_error_cross", "smallest_commits",
                     "start_roots", "flush_scored", "end_stand_centre",
                     "start_way_out", "stand_loops_sparse", "no_roll_back",
                     "smallest_agrees", "monotone_final", "monotone_pool", "end_at_vertex",
                     "filtered_pace", "beam_guard", "beam_moving", "beam_top"):
            if not isinstance(getattr(self, name), bool):
                out.append((name, f"must be true or false, got {getattr(self, name)!r}"))
        radius = self.off_network_m
        if not (isinstance(radius, int | float) and math.isfinite(radius) and radius >= 0):
            out.append(("off_network_m", f"must be a number >= 0, got {radius!r}"))
        elif radius > 0 and eps and radius < max(eps):
            out.append(("off_network_m", "must be 0 (the largest eps) or at least the largest "
                        f"eps level ({max(eps):g}), got {radius!r}"))
        if not (isinstance(self.beam_keep, int) and not isinstance(self.beam_keep, bool)
                and self.beam_keep >= 0):
            out.append(("beam_keep", f"must be an integer >= 0, got {self.beam_keep!r}"))
        if not (isinstance(self.reorder_fixes, int) and 0 <= self.reorder_fixes <= 32):
            out.append(("reorder_fixes", f"must be an integer 0..32, got {self.reorder_fixes!r}"))
        return out

    def off_network_radius(self) -> float:
        """The off-network radius in metres: ``off_network_m``, 0 meaning the largest eps.

        Example:
            >>> MatchSettings().off_network_radius()
            60.0
            >>> MatchSettings(eps_levels=(15.0, 30.0), off_network_m=60.0).off_network_radius()
            60.0
        """
        return self.off_network_m if self.off_network_m > 0.0 else max(self.eps_levels)

    def join_margin(self) -> float:
        """The join limit's margin in metres: ``join_margin_m``, 0 meaning twice the largest eps.

        Example:
            >>> MatchSettings().join_margin(), MatchSettings(eps_levels=(15.0, 30.0)).join_margin()
            (120.0, 60.0)
        """
        return self.join_margin_m if self.join_margin_m > 0.0 else 2.0 * max(self.eps_levels)

    @classmethod
    def keys(cls) -> tuple[str, ...]:
        """The configuration keys this section accepts."""
        return tuple(f.name for f in fields(cls))
