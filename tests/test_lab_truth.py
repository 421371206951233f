"""Scoring replay outputs against truth files, and diffing two runs, on hand-made cases."""

from __future__ import annotations

import gzip
import json

import pytest

from livematch.core.build import Road, network_from_roads
from livematch.lab.diff import RunOutputs, diff_runs, load_outputs, summarize_diff
from livematch.lab.truth import (
    DEMO_FORMAT,
    BadTruthError,
    Truth,
    load_truth,
    score_alerts,
    score_run,
    segment_lookup,
)
from livematch.sim.logs import TRUTH_FORMAT, write_jsonl

# A straight two-way street, way 7, nodes 1-2-3-4, three 100 m blocks east.
NET = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0), (200.0, 0.0), (300.0, 0.0)],
                               way=7)])
LOOKUP = segment_lookup(NET)
EAST = [{"way": 7, "from_node": a, "to_node": a + 1} for a in (1, 2, 3)]
WEST_1 = {"way": 7, "from_node": 2, "to_node": 1}


def _truth_records(fmt: str) -> list[dict]:
    """A vehicle driving east over all three blocks, one fix every 50 m."""
    recs: list[dict] = [{"kind": "header", "format": fmt, "version": 1}]
    recs.append({"kind": "path", "vehicle": "v", "segments": EAST, "length_m": 300.0})
    for i in range(6):
        pos = 25.0 + 50.0 * i
        block = int(pos // 100)
        recs.append({"kind": "fix", "vehicle": "v", "time": 100.0 + i, "x": pos, "y": 0.0,
                     **EAST[block], "offset_m": pos - 100 * block, "path_index": block,
                     "path_pos_m": pos, "outlier": False})
    return recs


def _assignment(t: float, road: dict) -> dict:
    return {"vehicle": "v", "time": t, **road}


def test_load_truth_reads_sim_format_plain_and_gzip(tmp_path):
    """A simulator truth file reads the same from .jsonl and .jsonl.gz."""
    plain, packed = tmp_path / "t.jsonl", tmp_path / "t.jsonl.gz"
    write_jsonl(plain, _truth_records(TRUTH_FORMAT))
    packed.write_bytes(gzip.compress(plain.read_bytes()))
    a, b = load_truth(plain), load_truth(packed)
    assert a.format == b.format == TRUTH_FORMAT
    assert a.vehicles["v"].path == b.vehicles["v"].path == [(7, 1, 2), (7, 2, 3), (7, 3, 4)]
    assert len(a.vehicles["v"].fixes) == len(b.vehicles["v"].fixes) == 6
    assert a.incidents == [] and b.incidents == []


def test_load_truth_demo_format_skips_silent_fixes_and_keeps_incidents(tmp_path):
    """Demo truth: silent reports are not scored; incidents and zones are read."""
    recs = _truth_records(DEMO_FORMAT)
    recs[0]["vehicles"] = [{"vehicle": "v", "zone": "zone-E"}]
    recs[3]["silent"] = True
    recs.append({"kind": "incident", "type": "silent", "vehicle": "v", "start": 101.0,
                 "end": 101.0})
    path = tmp_path / "demo.jsonl"
    write_jsonl(path, recs)
    truth = load_truth(path)
    assert [f["time"] for f in truth.vehicles["v"].fixes] == [100.0, 102.0, 103.0, 104.0,
                                                              105.0]
    assert truth.incidents[0]["type"] == "silent" and truth.zones == frozenset({"zone-E"})


def test_load_truth_refuses_other_files(tmp_path):
    """Anything but the two truth formats is refused, naming the file."""
    path = tmp_path / "x.jsonl"
    path.write_text(json.dumps({"kind": "header", "format": "other"}) + "\n")
    with pytest.raises(BadTruthError, match="not a truth file"):
        load_truth(path)


def test_score_run_counts_road_and_direction(tmp_path):
    """Right road and direction within 30 m along the path counts; reversed never does."""
    write_jsonl(tmp_path / "t.jsonl", _truth_records(TRUTH_FORMAT))
    truth = load_truth(tmp_path / "t.jsonl")
    # fixes at 25, 75, 125, 175, 225, 275 m
    live = [_assignment(100.0, EAST[0]), _assignment(101.0, WEST_1),  # reversed: wrong
            _assignment(102.0, EAST[0]),  # 125 m, block 1 ends at 100 m: 25 m back, counts
            _assignment(103.0, EAST[0]),  # 175 m: 75 m back, wrong
            _assignment(104.0, EAST[2])]  # 225 m: on the third block [200, 300], counts
    # no answer for the sixth fix: wrong
    commits = [{"vehicle": "v", "fixes": [
        {"time": 100.0 + i, **EAST[min(2, int((25 + 50 * i) // 100))]} for i in range(6)],
        "path": EAST}]
    s = score_run(truth, NET, LOOKUP, live, commits, [])
    assert s["truth_fixes"] == 6
    assert s["road_dir_live"] == round(3 / 6, 4)
    assert s["road_dir_final"] == 1.0
    assert s["route_mismatch"] == 0.0
    assert "incidents" not in s


def test_score_run_route_mismatch_by_newson_krumm(tmp_path):
    """RMF = (added + missed) / true length: the first block driven the wrong way."""
    write_jsonl(tmp_path / "t.jsonl", _truth_records(TRUTH_FORMAT))
    truth = load_truth(tmp_path / "t.jsonl")
    commits = [{"vehicle": "v", "fixes": [], "path": [WEST_1, EAST[1], EAST[2]]}]
    s = score_run(truth, NET, LOOKUP, [], commits, [])
    # Newson & Krumm 2009: added 100 m (2->1), missed 100 m (1->2), true length 300 m
    assert s["route_mismatch"] == round(200.0 / 300.0, 4)
    assert s["road_dir_live"] == 0.0 and s["road_dir_final"] == 0.0


def test_score_run_refuses_truth_of_another_map(tmp_path):
    """A truth segment the network lacks is an error naming it."""
    recs = _truth_records(TRUTH_FORMAT)
    recs[1]["segments"] = [{"way": 99, "from_node": 1, "to_node": 2}]
    write_jsonl(tmp_path / "t.jsonl", recs)
    with pytest.raises(BadTruthError, match=r"\(99, 1, 2\) of vehicle 'v'"):
        score_run(load_truth(tmp_path / "t.jsonl"), NET, LOOKUP, [], [], [])


def test_score_alerts_detection_grace_and_false_alerts():
    """Detected within [start, end + 60 s]; zone exits only of the zone; unscored kinds."""
    truth = Truth(DEMO_FORMAT, {}, {}, [
        {"type": "detour", "vehicle": "b", "start": 100.0, "end": 150.0},
        {"type": "zone_exit", "vehicle": "v", "start": 500.0, "end": 600.0, "zone": "z1"},
        {"type": "silent", "vehicle": "b", "start": 900.0, "end": 950.0},
        {"type": "outlier", "vehicle": "b", "start": 300.0, "end": 300.0},
    ], zones=frozenset({"z1", "z2"}))
    alerts = [
        {"vehicle": "b", "time": 99.0, "kind": "off_route"},    # before the detour: false
        {"vehicle": "b", "time": 205.0, "kind": "off_route"},   # within end + 60 s: found
        {"vehicle": "b", "time": 301.0, "kind": "off_route"},   # the outlier: false
        {"vehicle": "v", "time": 510.0, "kind": "fence_exit", "fence": "cust-1"},  # unscored
        {"vehicle": "v", "time": 520.0, "kind": "fence_exit", "fence": "z2"},  # wrong zone
        {"vehicle": "v", "time": 530.0, "kind": "fence_exit", "fence": "z1"},  # found
        {"vehicle": "b", "time": 700.0, "kind": "on_route"},    # unscored
    ]
    s = score_alerts(truth, alerts)
    assert (s["incidents"], s["detected"], s["missed"]) == (3, 2, 1)
    assert [r["delay_s"] for r in s["incident_results"]] == [105.0, 30.0, None]
    assert s["detection_delay_p50_s"] == 67.5 and s["detection_delay_max_s"] == 105.0
    assert s["false_alerts"] == 3
    assert s["false_alerts_by_kind"] == {"fence_exit": 1, "off_route": 2}


def _run(live: dict, final: dict, alerts: list[dict]) -> RunOutputs:
    return RunOutputs(live=live, final=final, alerts=alerts)


def test_diff_runs_lists_roads_and_alerts_that_differ():
    """Other road, missing answer, moved alert and lone alert each give one record."""
    r1 = {"way": 1, "from_node": 1, "to_node": 2}
    r2 = {"way": 2, "from_node": 5, "to_node": 6}
    a = _run({("v", 1.0): r1, ("v", 2.0): r1, ("w", 1.0): r1}, {("v", 1.0): r1},
             [{"vehicle": "v", "time": 10.0, "kind": "off_route"},
              {"vehicle": "v", "time": 50.0, "kind": "fence_exit", "fence": "f"}])
    b = _run({("v", 1.0): r1, ("v", 2.0): r2}, {("v", 1.0): r2},
             [{"vehicle": "v", "time": 14.0, "kind": "off_route"},
              {"vehicle": "v", "time": 50.0, "kind": "fence_exit", "fence": "f"},
              {"vehicle": "v", "time": 400.0, "kind": "stale"}])
    got = diff_runs(a, b, "A", "B")
    assert got == [
        {"a": "A", "b": "B", "vehicle": "v", "time": 1.0, "what": "final", "a_road": r1,
         "b_road": r2},
        {"a": "A", "b": "B", "vehicle": "v", "time": 2.0, "what": "live", "a_road": r1,
         "b_road": r2},
        {"a": "A", "b": "B", "vehicle": "v", "time": 10.0, "what": "alert",
         "kind": "off_route", "a_time": 10.0, "b_time": 14.0},
        {"a": "A", "b": "B", "vehicle": "v", "time": 400.0, "what": "alert", "kind": "stale",
         "a_time": None, "b_time": 400.0},
        {"a": "A", "b": "B", "vehicle": "w", "time": 1.0, "what": "live", "a_road": r1,
         "b_road": None},
    ]
    assert summarize_diff(got) == {
        "v": {"live": 1, "final": 1, "alert": 2, "first": 1.0, "last": 400.0},
        "w": {"live": 1, "final": 0, "alert": 0, "first": 1.0, "last": 1.0}}


def test_load_outputs_indexes_a_replay_folder(tmp_path):
    """Live and final roads are keyed by (vehicle, time); missing files read as empty."""
    (tmp_path / "assignments.jsonl").write_text(json.dumps(
        {"vehicle": "v", "time": 5, "way": 1, "from_node": 1, "to_node": 2, "eps_m": 15.0})
        + "\n")
    (tmp_path / "commits.jsonl").write_text(json.dumps(
        {"vehicle": "v", "fixes": [{"time": 5, "way": 1, "from_node": 2, "to_node": 1}],
         "path": []}) + "\n")
    out = load_outputs(tmp_path)
    assert out.live == {("v", 5.0): {"way": 1, "from_node": 1, "to_node": 2}}
    assert out.final == {("v", 5.0): {"way": 1, "from_node": 2, "to_node": 1}}
    assert out.alerts == []
