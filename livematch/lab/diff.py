"""Where two settings disagree: which vehicles, at which times, got another road or alert.

:func:`diff_runs` compares the output folders of two replays of the same log and returns
one record per difference, sorted by vehicle, time and kind of difference (the lines of
``DIR/diff.jsonl``):

* ``{"a", "b", "vehicle", "time", "what": "live", "a_road", "b_road"}``: the live
  assignment of the fix at ``time`` is on another directed segment (each road
  ``{"way", "from_node", "to_node"}``, or null when that setting gave no assignment);
* ``"what": "final"``: the same for the committed answer;
* ``"what": "alert"``: alerts of one ``kind`` (and fence, for fence alerts) of the
  vehicle are paired in time order when they lie within ``pair_s`` seconds of each other;
  a pair at different times gives ``a_time`` and ``b_time``, an alert without a partner
  gives ``null`` on the other side.

:func:`summarize_diff` condenses the records per vehicle (counts and the time span) for
the comparison table.
"""

from __future__ import annotations

import json
import os
from collections import defaultdict
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from livematch.errors import LivematchError

__all__ = ["RunOutputs", "diff_runs", "load_outputs", "read_jsonl", "summarize_diff"]

Road = dict[str, int]
#: Alerts of one kind closer than this (seconds) are taken as the same alert, moved.
PAIR_S = 120.0


def read_jsonl(path: str | os.PathLike[str]) -> list[dict[str, Any]]:
    """Every record of a JSON Lines file (a missing file gives none)."""
    p = Path(path)
    if not p.exists():
        return []
    try:
        with p.open(encoding="utf-8") as f:
            return [json.loads(line) for line in f if line.strip()]
    except (OSError, ValueError) as exc:
        raise LivematchError(f"cannot read {str(p)!r}: {exc}") from exc


@dataclass
class RunOutputs:
    """The records of one replay's output folder, indexed for comparison.

    Attributes:
        live: (vehicle, time) -> road of the assignment.
        final: (vehicle, time) -> road of the committed answer.
        alerts: the alert records, in file order.
        assignments, commits: the raw records (for scoring and plotting).
    """

    live: dict[tuple[str, float], Road] = field(default_factory=dict)
    final: dict[tuple[str, float], Road] = field(default_factory=dict)
    alerts: list[dict[str, Any]] = field(default_factory=list)
    assignments: list[dict[str, Any]] = field(default_factory=list)
    commits: list[dict[str, Any]] = field(default_factory=list)


def _road(rec: Mapping[str, Any]) -> Road:
    return {"way": rec["way"], "from_node": rec["from_node"], "to_node": rec["to_node"]}


def load_outputs(folder: str | os.PathLike[str]) -> RunOutputs:
    """Read ``assignments.jsonl``, ``commits.jsonl`` and ``alerts.jsonl`` of a replay."""
    d = Path(folder)
    out = RunOutputs(assignments=read_jsonl(d / "assignments.jsonl"),
                     commits=read_jsonl(d / "commits.jsonl"),
                     alerts=read_jsonl(d / "alerts.jsonl"))
    for rec in out.assignments:
        out.live[(rec["vehicle"], float(rec["time"]))] = _road(rec)
    for rec in out.commits:
        for f in rec["fixes"]:
            out.final[(rec["vehicle"], float(f["time"]))] = _road(f)
    return out


def _alert_key(rec: Mapping[str, Any]) -> tuple[str, str, str]:
    return rec["vehicle"], rec["kind"], str(rec.get("fence") or "")


def _pair(a_times: list[float], b_times: list[float], pair_s: float
          ) -> list[tuple[float | None, float | None]]:
    """Pair two sorted time lists in order, partners within ``pair_s``; unpaired alone.

    >>> _pair([10.0, 50.0], [12.0, 300.0], 60.0)
    [(10.0, 12.0), (50.0, None), (None, 300.0)]
    >>> _pair([], [], 1.0)
    []
    """
    out: list[tuple[float | None, float | None]] = []
    i = j = 0
    while i < len(a_times) or j < len(b_times):
        if i < len(a_times) and j < len(b_times) and abs(a_times[i] - b_times[j]) <= pair_s:
            out.append((a_times[i], b_times[j]))
            i += 1
            j += 1
        elif j >= len(b_times) or (i < len(a_times) and a_times[i] < b_times[j]):
            out.append((a_times[i], None))
            i += 1
        else:
            out.append((None, b_times[j]))
            j += 1
    return out


def diff_runs(a: RunOutputs, b: RunOutputs, name_a: str, name_b: str, *,
              pair_s: float = PAIR_S) -> list[dict[str, Any]]:
    """Every difference between two runs (see the module docstring), sorted.

    Example (degenerate: a run compared with itself has no difference):
        >>> run = RunOutputs(live={("v", 1.0): {"way": 1, "from_node": 1, "to_node": 2}})
        >>> diff_runs(run, run, "a", "b")
        []
    """
    out: list[dict[str, Any]] = []
    for what, da, db in (("live", a.live, b.live), ("final", a.final, b.final)):
        for key in sorted(set(da) | set(db)):
            ra, rb = da.get(key), db.get(key)
            if ra != rb:
                out.append({"a": name_a, "b": name_b, "vehicle": key[0], "time": key[1],
                            "what": what, "a_road": ra, "b_road": rb})
    times: dict[tuple[str, str, str], tuple[list[float], list[float]]] = defaultdict(
        lambda: ([], []))
    for side, alerts in ((0, a.alerts), (1, b.alerts)):
        for alert in alerts:
            times[_alert_key(alert)][side].append(float(alert["time"]))
    for (vehicle, kind, fence), (ta, tb) in sorted(times.items()):
        for t_a, t_b in _pair(sorted(ta), sorted(tb), pair_s):
            if t_a == t_b:
                continue
            rec: dict[str, Any] = {"a": name_a, "b": name_b, "vehicle": vehicle,
                                   "time": min(t for t in (t_a, t_b) if t is not None),
                                   "what": "alert", "kind": kind}
            if fence:
                rec["fence"] = fence
            rec.update({"a_time": t_a, "b_time": t_b})
            out.append(rec)
    order = {"live": 0, "final": 1, "alert": 2}
    out.sort(key=lambda r: (r["vehicle"], r["time"], order[r["what"]], r.get("kind", "")))
    return out


def summarize_diff(records: Iterable[Mapping[str, Any]]) -> dict[str, dict[str, Any]]:
    """Per vehicle: differing live / final fixes, alert differences, first and last time.

    >>> summarize_diff([{"vehicle": "v", "time": 5.0, "what": "live"},
    ...                 {"vehicle": "v", "time": 9.0, "what": "alert"}])
    {'v': {'live': 1, 'final': 0, 'alert': 1, 'first': 5.0, 'last': 9.0}}
    """
    out: dict[str, dict[str, Any]] = {}
    for rec in records:
        s = out.setdefault(rec["vehicle"], {"live": 0, "final": 0, "alert": 0,
                                            "first": rec["time"], "last": rec["time"]})
        s[rec["what"]] += 1
        s["first"] = min(s["first"], rec["time"])
        s["last"] = max(s["last"], rec["time"])
    return dict(sorted(out.items()))
