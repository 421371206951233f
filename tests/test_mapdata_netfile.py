"""Compiled network file: exact round trip, refusal of foreign files, opening any source."""

from __future__ import annotations

import importlib.resources
import json
import zipfile
from pathlib import Path

import networkx as nx
import numpy as np
import pytest

from livematch.errors import BadNetworkError
from livematch.mapdata.netfile import (
    load_network,
    load_network_detailed,
    open_network,
    open_network_detailed,
    save_network,
    source_kind,
)
from livematch.mapdata.options import ImportOptions
from livematch.mapdata.osm import read_osm
from livematch.mapdata.summary import largest_scc_share, network_summary

DATA = Path(__file__).parent / "data"
# Open data: pyrosm's test extract, © OpenStreetMap contributors, ODbL.
TEST_PBF = Path(str(importlib.resources.files("pyrosm") / "data" / "test.osm.pbf"))

ALL_ARRAYS = ("node_xy", "node_id", "seg_from", "seg_to", "seg_way", "seg_road", "seg_len",
              "out_ptr", "out_seg", "in_ptr", "in_seg", "seg_twin")


def test_save_load_round_trip_identical(tmp_path: Path) -> None:
    """Every array, the roads, the CRS and the import facts survive save and load exactly."""
    options = ImportOptions(include_service=False)
    network, stats = read_osm(TEST_PBF, options)
    path = tmp_path / "test.lmnet"
    save_network(network, path, options=options, stats=stats, built_at="2026-01-02T03:04:05Z")
    opened = load_network_detailed(path)
    loaded = opened.network
    for name in ALL_ARRAYS:
        mine, theirs = getattr(network, name), getattr(loaded, name)
        assert mine.dtype == theirs.dtype, name
        assert np.array_equal(mine, theirs), name
    assert loaded.roads == network.roads
    assert loaded.projection.crs == network.projection.crs
    assert loaded.source == network.source == "OpenStreetMap test.osm.pbf"
    assert opened.options == options
    assert opened.stats == stats
    assert opened.built_at == "2026-01-02T03:04:05Z"


def test_save_network_writes_plain_npz(tmp_path: Path) -> None:
    """The file is an .npz (zip of .npy) whose meta names the format and version 2."""
    network, _ = read_osm(DATA / "tiny_roads.osm")
    path = tmp_path / "tiny.lmnet"
    save_network(network, path)
    assert not (tmp_path / "tiny.lmnet.npz").exists()
    with zipfile.ZipFile(path) as zf:
        assert sorted(zf.namelist()) == sorted(
            f"{n}.npy" for n in ("meta", "node_xy", "node_id", "seg_from", "seg_to",
                                 "seg_way", "seg_road"))
    with np.load(path, allow_pickle=False) as data:
        meta = json.loads(str(data["meta"][()]))
    assert (meta["format"], meta["version"], meta["built_at"]) == ("livematch-network", 2, None)


def rewrite_meta(src: Path, dst: Path, **changes: object) -> None:
    with np.load(src, allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    meta = json.loads(str(arrays["meta"][()]))
    meta.update(changes)
    arrays["meta"] = np.array(json.dumps(meta))
    with open(dst, "wb") as fh:
        np.savez(fh, **arrays)  # type: ignore[arg-type]


def test_load_network_refuses_other_version(tmp_path: Path) -> None:
    """A file of another format version is refused with a rebuild hint."""
    network, _ = read_osm(DATA / "tiny_roads.osm")
    save_network(network, tmp_path / "a.lmnet")
    rewrite_meta(tmp_path / "a.lmnet", tmp_path / "b.lmnet", version=3)
    with pytest.raises(BadNetworkError, match=r"b\.lmnet: network file format version 3"):
        load_network(tmp_path / "b.lmnet")


def test_load_network_refuses_foreign_npz(tmp_path: Path) -> None:
    """An .npz without livematch metadata is not a network file."""
    with open(tmp_path / "x.lmnet", "wb") as fh:
        np.savez(fh, a=np.arange(3))
    with pytest.raises(BadNetworkError, match=r"x\.lmnet: not a livematch network file"):
        load_network(tmp_path / "x.lmnet")


def test_load_network_refuses_pickled_arrays(tmp_path: Path) -> None:
    """Object arrays (which need pickle) are refused, never unpickled."""
    network, _ = read_osm(DATA / "tiny_roads.osm")
    save_network(network, tmp_path / "a.lmnet")
    with np.load(tmp_path / "a.lmnet", allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    arrays["node_id"] = np.array([object()] * len(arrays["node_id"]), dtype=object)
    with open(tmp_path / "p.lmnet", "wb") as fh:
        np.savez(fh, **arrays)  # type: ignore[arg-type]
    with pytest.raises(BadNetworkError, match=r"p\.lmnet: not a livematch network file"):
        load_network(tmp_path / "p.lmnet")


def test_load_network_refuses_text(tmp_path: Path) -> None:
    """A text file named .lmnet is not a network file."""
    (tmp_path / "t.lmnet").write_text("hello\n")
    with pytest.raises(BadNetworkError, match=r"t\.lmnet: not a livematch network file"):
        load_network(tmp_path / "t.lmnet")


def test_open_network_dispatches_on_name_and_content(tmp_path: Path) -> None:
    """open_network reads OSM, GeoJSON and compiled files, also when the name says nothing."""
    osm = open_network(DATA / "tiny_roads.osm")
    geo = open_network(DATA / "small_roads.geojson")
    save_network(osm, tmp_path / "tiny.lmnet")
    assert np.array_equal(open_network(tmp_path / "tiny.lmnet").seg_way, osm.seg_way)
    for src, kind in [(DATA / "tiny_roads.osm", "osm-xml"),
                      (DATA / "small_roads.geojson", "geojson"),
                      (TEST_PBF, "osm-pbf"), (tmp_path / "tiny.lmnet", "lmnet")]:
        blind = tmp_path / f"blind-{kind}.dat"
        blind.write_bytes(src.read_bytes())
        assert source_kind(blind) == kind
        assert open_network_detailed(blind).network.n_segments > 0
    assert open_network(tmp_path / "blind-geojson.dat").n_segments == geo.n_segments


def test_source_kind_refuses_unknown(tmp_path: Path) -> None:
    """A file that is none of the known formats is not a road map."""
    (tmp_path / "notes.txt").write_text("shopping list\n")
    with pytest.raises(BadNetworkError, match=r"notes\.txt: not a road map"):
        source_kind(tmp_path / "notes.txt")


def test_largest_scc_share_against_networkx() -> None:
    """The share equals a direct networkx count on the OSM test extract."""
    network, _ = read_osm(TEST_PBF)
    graph = nx.MultiDiGraph()
    graph.add_edges_from(zip(network.seg_from.tolist(), network.seg_to.tolist(), strict=True))
    best = max(
        (graph.subgraph(c).number_of_edges()
         for c in nx.strongly_connected_components(graph)),
    )
    assert largest_scc_share(network) == pytest.approx(best / network.n_segments, abs=0)


def test_network_summary_tiny_osm() -> None:
    """Counts and classes of the invented XML file; two-way roads counted once."""
    network, _ = read_osm(DATA / "tiny_roads.osm")
    facts = network_summary(network)
    assert (facts["vertices"], facts["segments"], facts["ways"]) == (9, 17, 8)
    assert facts["largest_scc_segment_share"] == 1.0
    assert facts["bbox_wgs84"] == pytest.approx([10.0, 50.0, 10.003, 50.002], abs=1e-9)
    by_class = facts["length_m_by_highway"]
    # residential: way 100 (1->2->3, 0.002 deg of longitude at 50 N) plus way 106 (7->8,
    # 0.001 deg of latitude), each counted once although both are two-way.
    seg = {network.source_ids(s): float(network.seg_len[s]) for s in range(17)}
    expected = seg[(100, 1, 2)] + seg[(100, 2, 3)] + seg[(106, 7, 8)]
    assert by_class["residential"] == pytest.approx(round(expected, 1), abs=0.05)
    assert by_class["primary"] == pytest.approx(round(seg[(101, 4, 3)], 1), abs=0.05)
