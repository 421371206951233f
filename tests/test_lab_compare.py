"""The replay lab comparing settings on the shipped Larkmoor sample log."""

from __future__ import annotations

import contextlib
import io
import json
import re
from collections import Counter
from pathlib import Path

import pytest

from livematch.cli import main
from livematch.lab.compare import format_cell, table_rows, value_at
from livematch.lab.report import clock

SAMPLES = Path(__file__).resolve().parents[1] / "replay_logs"
LOG = SAMPLES / "larkmoor-morning.jsonl.gz"
NETWORK = SAMPLES / "larkmoor.geojson"
ROUTES = SAMPLES / "larkmoor-routes.geojson"
FENCES = SAMPLES / "larkmoor-fences.geojson"
TRUTH = SAMPLES / "larkmoor-truth.jsonl.gz"
OUTPUTS = ("alerts.jsonl", "assignments.jsonl", "commits.jsonl", "rejects.jsonl",
           "summary.json")


def _configs(folder: Path) -> tuple[Path, Path]:
    """Two settings that differ in their eps ladder (so in their assignments)."""
    strict = folder / "strict.toml"
    strict.write_text("[matcher]\neps_levels = [10.0, 20.0, 40.0]\n")
    loose = folder / "loose.toml"
    loose.write_text("[matcher]\neps_levels = [20.0, 40.0, 80.0]\n")
    return strict, loose


def _lab(out: Path, *configs: Path, extra: tuple[str, ...] = ()) -> int:
    args = ["replay", str(LOG), "--network", str(NETWORK), "--routes", str(ROUTES),
            "--fences", str(FENCES), "--out", str(out)]
    for config in configs:
        args += ["--config", str(config)]
    return main([*args, *extra])


def _lines(path: Path) -> list[dict]:
    return [json.loads(line) for line in path.read_text().splitlines() if line]


@pytest.fixture(scope="module")
def lab(tmp_path_factory: pytest.TempPathFactory) -> dict:
    """The lab run once: two settings with truth; stdout kept."""
    base = tmp_path_factory.mktemp("lab")
    strict, loose = _configs(base)
    out = base / "out"
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        assert _lab(out, strict, loose, extra=("--truth", str(TRUTH))) == 0
    doc = json.loads((out / "compare.json").read_text())
    return {"base": base, "out": out, "strict": strict, "loose": loose, "stdout":
            buf.getvalue(), "doc": doc, "rows": doc["settings"]}


def test_lab_writes_each_setting_into_its_folder(lab):
    """DIR/<config stem>/ holds the replay files; compare.md/json and diff.jsonl beside."""
    out = lab["out"]
    assert sorted(p.name for p in out.iterdir()) == [
        "compare.json", "compare.md", "diff.jsonl", "loose", "strict"]
    for name in ("strict", "loose"):
        assert sorted(p.name for p in (out / name).iterdir()) == list(OUTPUTS)
    assert [r["setting"] for r in lab["rows"]] == ["strict", "loose"]
    assert [r["config"] for r in lab["rows"]] == [str(lab["strict"]), str(lab["loose"])]


def test_lab_setting_folder_equals_plain_replay(lab, tmp_path):
    """A setting's folder is byte for byte what `livematch replay --config` writes."""
    plain = tmp_path / "plain"
    assert _lab(plain, lab["strict"]) == 0
    for name in OUTPUTS:
        assert (plain / name).read_bytes() == (lab["out"] / "strict" / name).read_bytes()


def test_lab_same_log_same_settings_same_files(lab, tmp_path):
    """Two lab runs give identical files; only the µs per fix timing may differ."""
    again = tmp_path / "again"
    assert _lab(again, lab["strict"], lab["loose"], extra=("--truth", str(TRUTH))) == 0
    first = lab["out"]
    for name in ("strict", "loose"):
        for f in OUTPUTS:
            assert (again / name / f).read_bytes() == (first / name / f).read_bytes()
    assert (again / "diff.jsonl").read_bytes() == (first / "diff.jsonl").read_bytes()

    def untimed(doc: dict) -> dict:
        for row in doc["settings"]:
            row.pop("us_per_fix")
        return doc

    assert untimed(json.loads((again / "compare.json").read_text())) == untimed(
        json.loads((first / "compare.json").read_text()))
    strip = re.compile(r"^\| µs per fix \|.*$", re.M)
    assert strip.sub("", (again / "compare.md").read_text()) == strip.sub(
        "", (first / "compare.md").read_text())


def _table(markdown: str) -> dict[str, list[str]]:
    """The cells of the first table (the one headed `| measure |`), by row label."""
    rows: dict[str, list[str]] = {}
    lines = markdown.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("| measure |"))
    for line in lines[start + 2:]:
        if not line.startswith("| "):
            break
        cells = [c.strip() for c in line.strip("|").split("|")]
        rows[cells[0]] = cells[1:]
    return rows


def test_lab_table_shows_exactly_the_json_numbers(lab):
    """Every table cell (compare.md and stdout) is the compare.json value of its row."""
    rows = lab["rows"]
    md = _table((lab["out"] / "compare.md").read_text())
    printed = _table(lab["stdout"])
    assert printed == md
    lines = table_rows(rows)
    assert len(md) == len(lines)
    for label, key in lines:
        assert md[label.strip()] == [format_cell(value_at(r, key)) for r in rows], label


def test_lab_json_numbers_equal_each_summary(lab):
    """compare.json's counts are those of each setting's summary.json and output files."""
    for row in lab["rows"]:
        folder = lab["out"] / row["setting"]
        summary = json.loads((folder / "summary.json").read_text())
        assert row["messages"] == summary["messages"] == 3940
        assert row["fixes"] == summary["fixes"]
        assert row["rejects"] == summary["rejects"]["total"]
        assert row["filtered_by_reason"] == {
            **dict.fromkeys(row["filtered_by_reason"], 0), **summary["filtered"]["by_reason"]}
        lines = _lines(folder / "assignments.jsonl")  # held answers: hold_filtered
        assert row["assignments"] == summary["assignments"] == sum(
            1 for r in lines if not r.get("held"))
        assert len(lines) == summary["assignments"] + summary["assignments_held"]
        assert row["eps_share"] == {f"{e['eps_m']:g}": e["share"]
                                    for e in summary["eps_levels"]}
        alerts = _lines(folder / "alerts.jsonl")
        assert row["alerts"] == summary["alerts"] == len(alerts)
        kinds = Counter(a["kind"] for a in alerts)
        assert {k: v for k, v in row["alerts_by_kind"].items() if v} == dict(kinds)
        # every fix is settled once: during the feed or by the end-of-log flush
        settled = sum(len(c["fixes"]) for c in _lines(folder / "commits.jsonl"))
        assert round((settled - row["settled_by_flush"]) / row["assignments"], 4) == \
            row["committed_share"]
        assert 0 <= row["commit_lag_p50_s"] <= row["commit_lag_p95_s"]


def test_lab_settings_differ_in_eps_shares_and_roads(lab):
    """The two ladders certify at different levels and put some fixes on other roads."""
    strict, loose = lab["rows"]
    assert set(strict["eps_share"]) == {"10", "20", "40"}
    assert set(loose["eps_share"]) == {"20", "40", "80"}
    assert strict["eps_share"]["20"] != loose["eps_share"]["20"]
    diff = _lines(lab["out"] / "diff.jsonl")
    a = {(r["vehicle"], r["time"]): r for r in _lines(lab["out"] / "strict" /
                                                       "assignments.jsonl")}
    b = {(r["vehicle"], r["time"]): r for r in _lines(lab["out"] / "loose" /
                                                       "assignments.jsonl")}

    def road(r: dict | None) -> dict | None:
        return None if r is None else {k: r[k] for k in ("way", "from_node", "to_node")}

    expected = sorted(k for k in set(a) | set(b) if road(a.get(k)) != road(b.get(k)))
    live = [r for r in diff if r["what"] == "live"]
    assert expected and sorted((r["vehicle"], r["time"]) for r in live) == expected
    for r in live:
        key = (r["vehicle"], r["time"])
        assert (r["a"], r["b"]) == ("strict", "loose")
        assert r["a_road"] == road(a.get(key)) and r["b_road"] == road(b.get(key))
    summary = lab["doc"]["diff"]["strict vs loose"]
    assert sum(s["live"] for s in summary.values()) == len(live)


def test_lab_truth_finds_the_scripted_incidents(lab):
    """The sample's detour, silence and zone exit are each reported by their alert."""
    for row in lab["rows"]:
        alerts = _lines(lab["out"] / row["setting"] / "alerts.jsonl")
        assert row["truth_fixes"] == 3940
        assert (row["incidents"], row["detected"], row["missed"]) == (3, 3, 0)
        by_type = {r["type"]: r for r in row["incident_results"]}
        assert set(by_type) == {"detour", "silent", "zone_exit"}
        detour = by_type["detour"]
        assert detour["vehicle"] == "bus-21" and detour["alert"] == "off_route"
        first = min(a["time"] for a in alerts
                    if a["vehicle"] == "bus-21" and a["kind"] == "off_route")
        assert detour["delay_s"] == round(first - detour["start"], 3)
        assert 0.0 <= row["road_dir_live"] <= row["road_dir_final"] <= 1.0
        assert 0.0 <= row["route_mismatch"] < 0.2
    md = (lab["out"] / "compare.md").read_text()
    strict, loose = lab["rows"]
    for a, b in zip(strict["incident_results"], loose["incident_results"], strict=True):
        assert (f"| {a['type']} | {a['vehicle']} | {clock(a['start'])} | {a['alert']} | "
                f"{a['delay_s']} | {b['delay_s']} |") in md


def test_lab_single_setting_with_report_writes_into_out(tmp_path):
    """One --config with --report: the plain replay files in DIR, plus report.html."""
    strict, _ = _configs(tmp_path)
    out = tmp_path / "out"
    assert _lab(out, strict, extra=("--report", "--vehicles", "bus-21")) == 0
    assert sorted(p.name for p in out.iterdir()) == sorted([*OUTPUTS, "report.html"])


def test_lab_refuses_two_settings_with_one_name(tmp_path, capsys):
    """Config files with the same stem would share a folder: refused, both named."""
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    for d in ("a", "b"):
        (tmp_path / d / "x.toml").write_text("[matcher]\n")
    assert _lab(tmp_path / "out", tmp_path / "a" / "x.toml", tmp_path / "b" / "x.toml") == 2
    err = capsys.readouterr().err
    assert "have the same name 'x'" in err and not (tmp_path / "out").exists()


def test_lab_settings_that_differ_in_alerts(tmp_path):
    """A twitchy [alerts] setting raises more off-route alerts on the same log; the table,
    compare.json, each summary and diff.jsonl all say so with the same numbers."""
    calm = tmp_path / "calm.toml"
    calm.write_text("[alerts]\noff_route_s = 10.0\n")
    twitchy = tmp_path / "twitchy.toml"
    twitchy.write_text("[alerts]\neps_route_m = 20.0\noff_route_s = 3.0\noff_route_m = 20.0\n")
    out = tmp_path / "out"
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        assert _lab(out, calm, twitchy, extra=("--truth", str(TRUTH))) == 0
    rows = json.loads((out / "compare.json").read_text())["settings"]
    by = {r["setting"]: r for r in rows}
    for name, row in by.items():
        alerts = _lines(out / name / "alerts.jsonl")
        summary = json.loads((out / name / "summary.json").read_text())
        kinds = Counter(a["kind"] for a in alerts)
        assert row["alerts"] == summary["alerts"] == len(alerts)
        assert row["alerts_by_kind"]["off_route"] == kinds["off_route"]
    assert by["twitchy"]["alerts_by_kind"]["off_route"] > by["calm"]["alerts_by_kind"][
        "off_route"] >= 1
    assert by["twitchy"]["false_alerts"] > by["calm"]["false_alerts"]
    md = _table((out / "compare.md").read_text())
    assert md["alert: off_route"] == [str(by["calm"]["alerts_by_kind"]["off_route"]),
                                      str(by["twitchy"]["alerts_by_kind"]["off_route"])]
    assert md == _table(buf.getvalue())
    moved = [r for r in _lines(out / "diff.jsonl") if r["what"] == "alert"]
    extra = by["twitchy"]["alerts"] - by["calm"]["alerts"]
    assert sum(r["a_time"] is None for r in moved) - sum(r["b_time"] is None for r in moved) \
        == extra
