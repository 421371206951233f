"""One replay per setting on the same log, and the numbers to compare them by.

:func:`run_setting` replays a log through a pipeline with
:func:`livematch.commands.replay.replay` itself, so each setting's folder holds exactly
what ``livematch replay`` writes (byte for byte), while an observer around the pipeline
measures what the output files cannot tell: when each commit was published, and the
processing time.

:func:`measures` turns a run into one row of the comparison (``compare.json``), every
number either copied from that run's ``summary.json`` or computed from its output
files, so the table and the summaries agree by construction:

=============================  ===========================================================
``messages`` ``fixes``         as in ``summary.json``
``rejects`` (+ ``_by_reason``)  decoder rejects (``summary.json`` ``rejects``)
``filtered`` (+ by reason)     fixes refused by the tracker's filters
``assignments``                live assignments
``eps_share``                  per eps level (metres), share of assignments certified at
                               it (``summary.json`` ``eps_levels``)
``committed_share``            share of assignments whose fix was settled by a commit
                               published *during* the feed (the rest were settled by the
                               end-of-log flush: ``settled_by_flush`` fixes)
``commit_lag_p50_s`` / p95     for those fixes: the vehicle's newest fix time when the
                               commit was published minus the fix's time, seconds of fix
                               time (50th / 95th percentile, linear interpolation)
``alerts`` (+ ``_by_kind``)    alert records by ``kind``
``us_per_fix``                 wall time in the pipeline (handle, tick, flush) per fix,
                               microseconds; the only number that varies between runs
=============================  ===========================================================

Truth measures (:mod:`livematch.lab.truth`) are merged into the row when a truth file is
given.
"""

from __future__ import annotations

import time
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import numpy as np

from livematch.errors import LivematchError
from livematch.lab.diff import RunOutputs
from livematch.lab.pace import Pacer
from livematch.pipeline import Output, Pipeline

__all__ = ["COUNT_GROUPS", "TABLE_ROWS", "RunResult", "Setting", "complete_rows",
           "format_cell", "measures", "run_setting", "setting_names", "table_rows",
           "value_at"]


@dataclass(frozen=True)
class Setting:
    """One setting to replay under: its name (the config file's stem) and the file."""

    name: str
    config: str | None


def setting_names(configs: Sequence[str | None]) -> list[Setting]:
    """Name each config by its file stem (``default`` for none).

    Raises:
        LivematchError: two configs with the same stem (their folders would clash).

    >>> [s.name for s in setting_names(["cfg/strict.toml", "loose.toml"])]
    ['strict', 'loose']
    >>> setting_names([None])[0].name
    'default'
    >>> setting_names(["a/x.toml", "b/x.toml"])
    Traceback (most recent call last):
    ...
    livematch.errors.LivematchError: --config a/x.toml and b/x.toml have the same name 'x'; \
rename one (each setting's outputs go to DIR/<name>/)
    """
    out: list[Setting] = []
    seen: dict[str, str | None] = {}
    for config in configs:
        name = Path(config).name.split(".")[0] if config else "default"
        if name in seen:
            raise LivematchError(f"--config {seen[name]} and {config} have the same name "
                                 f"{name!r}; rename one (each setting's outputs go to "
                                 "DIR/<name>/)")
        seen[name] = config
        out.append(Setting(name, config))
    return out


@dataclass
class RunResult:
    """What one setting's replay gave: its folder, summary and the observer's numbers."""

    setting: Setting
    out_dir: Path
    summary: dict[str, Any]
    lags: list[float] = field(default_factory=list)
    settled_live: int = 0
    settled_by_flush: int = 0
    seconds: float = 0.0


class _Observer:
    """Wraps a pipeline for :func:`replay`: paces, times, and watches commits go out.

    Everything but ``handle``, ``tick`` and ``flush`` is the pipeline's own.
    """

    def __init__(self, pipeline: Pipeline, result: RunResult, pacer: Pacer | None,
                 progress: Callable[[int], None] | None) -> None:
        self._pipeline = pipeline
        self._result = result
        self._pacer = pacer
        self._progress = progress
        self._newest: dict[str, float] = {}

    def __getattr__(self, name: str) -> Any:
        return getattr(self._pipeline, name)

    def handle(self, topic: str, payload: bytes, at: float) -> list[Output]:
        if self._pacer is not None:
            self._pacer.wait(at)
        started = time.perf_counter()
        out = self._pipeline.handle(topic, payload, at)
        self._result.seconds += time.perf_counter() - started
        self._watch(out, flushing=False)
        if self._progress is not None:
            self._progress(1)
        return out

    def tick(self, now: float) -> list[Output]:
        started = time.perf_counter()
        out = self._pipeline.tick(now)
        self._result.seconds += time.perf_counter() - started
        return out

    def flush(self) -> list[Output]:
        started = time.perf_counter()
        out = self._pipeline.flush()
        self._result.seconds += time.perf_counter() - started
        self._watch(out, flushing=True)
        return out

    def _watch(self, outputs: list[Output], *, flushing: bool) -> None:
        for item in outputs:
            vehicle = item.vehicle
            if vehicle is None:
                continue
            if item.kind == "assignment":
                t = float(item.record["time"])
                self._newest[vehicle] = max(self._newest.get(vehicle, t), t)
            elif item.kind == "commit":
                fixes = item.record["fixes"]
                if flushing:
                    self._result.settled_by_flush += len(fixes)
                    continue
                newest = max([self._newest.get(vehicle, -np.inf),
                              *(float(f["time"]) for f in fixes)])
                self._result.settled_live += len(fixes)
                self._result.lags.extend(newest - float(f["time"]) for f in fixes)


def run_setting(setting: Setting, log: str | Path, pipeline: Pipeline, out_dir: str | Path,
                *, pacer: Pacer | None = None,
                progress: Callable[[int], None] | None = None) -> RunResult:
    """Replay ``log`` through ``pipeline`` into ``out_dir`` (as ``livematch replay`` does).

    Args:
        setting: the setting's name and file (copied into the result).
        log: the replay log.
        pipeline: a fresh pipeline built from the setting.
        out_dir: the folder for the outputs.
        pacer: pace by the log's receive times (None: as fast as possible).
        progress: called with 1 after each message.
    """
    from livematch.commands.replay import replay  # the command module imports the lab

    result = RunResult(setting, Path(out_dir), {})
    observer = _Observer(pipeline, result, pacer, progress)
    result.summary = replay(log, cast(Pipeline, observer), out_dir)
    return result


def _percentile(values: Sequence[float], q: float) -> float | None:
    return round(float(np.percentile(values, q)), 3) if len(values) else None


def measures(result: RunResult, outputs: RunOutputs) -> dict[str, Any]:
    """The comparison row of one run (see the module docstring for every key).

    Example (degenerate: a run that handled nothing):
        >>> from livematch.commands.replay import summarize
        >>> from livematch.core.settings import MatchSettings
        >>> r = RunResult(Setting("a", None), Path("."),
        ...               summarize(Counter(), MatchSettings(eps_levels=(20.0,)), 0))
        >>> m = measures(r, RunOutputs())
        >>> m["fixes"], m["eps_share"], m["committed_share"], m["commit_lag_p50_s"]
        (0, {'20': 0.0}, None, None)
    """
    s = result.summary
    assignments = s["assignments"]
    kinds = Counter(str(a["kind"]) for a in outputs.alerts)
    fixes = s["fixes"]
    return {
        "setting": result.setting.name,
        "config": result.setting.config,
        "messages": s["messages"],
        "fixes": fixes,
        "rejects": s["rejects"]["total"],
        "rejects_by_reason": dict(s["rejects"]["by_reason"]),
        "filtered": s["filtered"]["total"],
        "filtered_by_reason": dict(s["filtered"]["by_reason"]),
        "assignments": assignments,
        "eps_share": {f"{level['eps_m']:g}": level["share"] for level in s["eps_levels"]},
        "committed_share": round(result.settled_live / assignments, 4) if assignments
        else None,
        "settled_by_flush": result.settled_by_flush,
        "commit_lag_p50_s": _percentile(result.lags, 50),
        "commit_lag_p95_s": _percentile(result.lags, 95),
        "alerts": s["alerts"],
        "alerts_by_kind": dict(sorted(kinds.items())),
        "us_per_fix": round(1e6 * result.seconds / fixes, 1) if fixes else None,
    }


#: The table's fixed rows: (label, key in the row). Per-reason, per-level and per-kind
#: rows are added between them by :func:`table_rows`.
TABLE_ROWS: tuple[tuple[str, str], ...] = (
    ("messages", "messages"),
    ("fixes", "fixes"),
    ("rejects", "rejects"),
    ("filtered", "filtered"),
    ("assignments", "assignments"),
    ("committed share", "committed_share"),
    ("settled by flush (fixes)", "settled_by_flush"),
    ("commit lag p50 (s)", "commit_lag_p50_s"),
    ("commit lag p95 (s)", "commit_lag_p95_s"),
    ("alerts", "alerts"),
    ("µs per fix", "us_per_fix"),
    ("truth fixes", "truth_fixes"),
    ("road+dir live", "road_dir_live"),
    ("road+dir final", "road_dir_final"),
    ("route mismatch", "route_mismatch"),
    ("incidents", "incidents"),
    ("incidents detected", "detected"),
    ("incidents missed", "missed"),
    ("detection delay p50 (s)", "detection_delay_p50_s"),
    ("detection delay max (s)", "detection_delay_max_s"),
    ("false alerts", "false_alerts"),
)
_GROUPS = {  # a fixed row -> (label prefix, dict key) of the rows that follow it
    "rejects": ("  reject", "rejects_by_reason"),
    "filtered": ("  filtered", "filtered_by_reason"),
    "assignments": ("  share at eps", "eps_share"),
    "alerts": ("  alert", "alerts_by_kind"),
    "false_alerts": ("  false", "false_alerts_by_kind"),
}


def value_at(row: Mapping[str, Any], key: str) -> Any:
    """The value at a dotted ``key`` of a row (None when absent).

    >>> value_at({"eps_share": {"15": 0.5}}, "eps_share.15"), value_at({}, "x.y")
    (0.5, None)
    """
    value: Any = row
    for part in key.split(".", 1):
        if not isinstance(value, Mapping) or part not in value:
            return None
        value = value[part]
    return value


def table_rows(rows: Sequence[Mapping[str, Any]]) -> list[tuple[str, str]]:
    """(label, key) of every table line for these runs; rows no run has are left out."""
    out: list[tuple[str, str]] = []
    for label, key in TABLE_ROWS:
        if all(value_at(r, key) is None for r in rows) and key not in (
                "committed_share", "commit_lag_p50_s", "commit_lag_p95_s", "us_per_fix"):
            continue
        out.append((label, key))
        if key in _GROUPS:
            prefix, group = _GROUPS[key]
            names: list[str] = []
            for r in rows:
                for name in r.get(group) or {}:
                    if name not in names:
                        names.append(name)
            if group == "eps_share":
                names.sort(key=float)
                out += [(f"{prefix} {n} m", f"{group}.{n}") for n in names]
            else:
                out += [(f"{prefix}: {n}", f"{group}.{n}") for n in sorted(names)]
    return out


#: Groups whose absent names mean zero (counts), unlike ``eps_share`` (level not in the
#: ladder: no value).
COUNT_GROUPS = ("rejects_by_reason", "filtered_by_reason", "alerts_by_kind",
                "false_alerts_by_kind")


def complete_rows(rows: Sequence[dict[str, Any]]) -> None:
    """Give every row the same reason and kind names, zero where a run had none.

    >>> rows = [{"alerts_by_kind": {"stale": 1}}, {"alerts_by_kind": {}}]
    >>> complete_rows(rows); rows[1]
    {'alerts_by_kind': {'stale': 0}}
    """
    for group in COUNT_GROUPS:
        if not any(group in r for r in rows):
            continue
        names = sorted({n for r in rows for n in r.get(group) or {}})
        for r in rows:
            have = r.get(group) or {}
            r[group] = {n: have.get(n, 0) for n in names}


def format_cell(value: Any) -> str:
    """How a value is shown in the table: exactly its JSON number, ``–`` for none.

    >>> format_cell(0.8125), format_cell(3), format_cell(None), format_cell(15.0)
    ('0.8125', '3', '–', '15.0')
    """
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    return str(value)
