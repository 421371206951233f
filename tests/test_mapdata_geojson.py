"""GeoJSON import: ids, one-way values, shared-coordinate nodes, and refusal of bad files."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from pyproj import Geod

from livematch.errors import BadNetworkError
from livematch.mapdata.geojson import read_geojson, road_id_from_string
from livematch.mapdata.options import ImportOptions

SMALL = Path(__file__).parent / "data" / "small_roads.geojson"


def spur_id() -> int:
    # RFC 7693 BLAKE2b via hashlib, 8-byte digest read big-endian signed: the documented rule.
    return int.from_bytes(hashlib.blake2b(b"spur-a", digest_size=8).digest(), "big", signed=True)


def test_read_geojson_exact_segments() -> None:
    """The fixture gives exactly the segments its oneway values call for, in order."""
    network, stats = read_geojson(SMALL)
    spur = spur_id()
    assert [network.source_ids(s) for s in range(network.n_segments)] == [
        (11, 1, 2), (11, 2, 3),                 # oneway "yes", repeated position skipped
        (spur, 3, 4), (spur, 4, 3),             # MultiLineString part 1, two-way
        (spur, 2, 5), (spur, 5, 2),             # part 2 (altitude ignored), two-way
        (12, 6, 1),                             # oneway "-1"; start snapped onto node 1
    ]
    assert (stats.ways_seen, stats.ways_kept) == (3, 3)


def test_read_geojson_roads_and_string_ids() -> None:
    """Roads keep name/ref/highway (default "road"); a string id is kept as source_id."""
    network, _ = read_geojson(SMALL)
    assert network.roads == [
        {"name": "Harbour Road", "ref": None, "highway": "primary"},
        {"name": None, "ref": "S1", "highway": "road", "source_id": "spur-a"},
        {"name": "Back Lane", "ref": None, "highway": "residential"},
    ]
    assert road_id_from_string("spur-a") == spur_id()


def test_read_geojson_shared_coordinates_connect() -> None:
    """Positions equal to 1e-9 degree are one node: six distinct positions, six vertices."""
    network, _ = read_geojson(SMALL)
    assert network.node_id.tolist() == [1, 2, 3, 4, 5, 6]
    lon, lat = network.projection.to_lonlat(network.node_xy[:, 0], network.node_xy[:, 1])
    np.testing.assert_allclose([lon[0], lat[0]], [24.94, 60.17], atol=1e-9)


def test_read_geojson_lengths_match_geodesic() -> None:
    """Segment lengths agree with pyproj Geod on WGS84 within 0.1 %."""
    network, _ = read_geojson(SMALL)
    geod = Geod(ellps="WGS84")
    lon, lat = network.projection.to_lonlat(network.node_xy[:, 0], network.node_xy[:, 1])
    _, _, expected = geod.inv(lon[network.seg_from], lat[network.seg_from],
                              lon[network.seg_to], lat[network.seg_to])
    np.testing.assert_allclose(network.seg_len, expected, rtol=1e-3)


def test_read_geojson_utm_projection() -> None:
    """The projection options apply: 24.94 E, 60.17 N lies in UTM zone 35 (EPSG:32635)."""
    network, _ = read_geojson(SMALL, ImportOptions(projection="utm"))
    assert network.projection.crs == "EPSG:32635"


def collection(*features: Any) -> dict[str, Any]:
    return {"type": "FeatureCollection", "features": list(features)}


def line(coords: Any, **props: Any) -> dict[str, Any]:
    return {"type": "Feature", "properties": props,
            "geometry": {"type": "LineString", "coordinates": coords}}


GOOD = [[0.0, 0.0], [0.001, 0.0]]


@pytest.mark.parametrize(
    ("value", "expected"),
    [(True, 1), ("yes", 1), ("true", 1), ("1", 1), (1, 1), ("YES", 1),
     ("-1", 1), (-1, 1), ("reverse", 1),
     (False, 2), ("no", 2), ("false", 2), ("0", 2), (0, 2), (None, 2)],
)
def test_read_geojson_oneway_values(tmp_path: Path, value: Any, expected: int) -> None:
    """Every documented oneway spelling gives one or two directions."""
    path = tmp_path / "one.geojson"
    path.write_text(json.dumps(collection(line(GOOD, oneway=value))))
    network, _ = read_geojson(path)
    assert network.n_segments == expected


def test_read_geojson_id_fallbacks(tmp_path: Path) -> None:
    """Feature id wins over properties.id; with neither the feature index is used."""
    first = line(GOOD, id=5) | {"id": 9}
    second = line([[0.0, 0.001], [0.001, 0.001]], id=7)
    third = line([[0.0, 0.002], [0.001, 0.002]], oneway=True)
    path = tmp_path / "ids.geojson"
    path.write_text(json.dumps(collection(first, second, third)))
    network, _ = read_geojson(path)
    assert sorted(set(network.seg_way.tolist())) == [2, 7, 9]


def test_read_geojson_skips_degenerate_feature(tmp_path: Path) -> None:
    """A feature whose positions are all the same gives no road and is counted."""
    path = tmp_path / "deg.geojson"
    path.write_text(json.dumps(collection(line([[1.0, 1.0], [1.0, 1.0]]), line(GOOD))))
    network, stats = read_geojson(path)
    assert (len(network.roads), stats.degenerate) == (1, 1)


BROKEN: list[tuple[str, str, str]] = [
    ("not json {", "not JSON", "text"),
    (json.dumps([1, 2]), "expected a GeoJSON FeatureCollection, got 'list'", "list"),
    (json.dumps({"type": "Feature"}), "expected a GeoJSON FeatureCollection, got 'Feature'",
     "feature"),
    (json.dumps({"type": "FeatureCollection"}), "no 'features' list", "nofeatures"),
    (json.dumps(collection()), "no roads", "empty"),
    (json.dumps(collection({"type": "Feature", "properties": {},
                            "geometry": {"type": "Point", "coordinates": [0, 0]}})),
     "feature 0: geometry type 'Point' is not LineString", "point"),
    (json.dumps(collection({"type": "Feature", "properties": {}, "geometry": None})),
     "feature 0: geometry must be a LineString", "nullgeom"),
    (json.dumps(collection(line(GOOD), line([[0, 0], ["a", 1]]))),
     "feature 1: bad position ['a', 1]", "string"),
    (json.dumps(collection(line([[0, 0], [0, 91]]))), "outside WGS84", "range"),
    (json.dumps(collection(line([[0, 0]]))), "at least two positions", "short"),
    (json.dumps(collection(line(GOOD, oneway="sometimes"))),
     "properties.oneway 'sometimes'", "oneway"),
    (json.dumps(collection(line(GOOD) | {"id": [1]})), "id must be an integer or a string",
     "badid"),
    (json.dumps(collection(line(GOOD, name=["x"]))), "properties.name must be a string",
     "badname"),
    ('{"type": "FeatureCollection", "features": [{"type": "Feature", "properties": {}, '
     '"geometry": {"type": "LineString", "coordinates": [[0, 0], [NaN, 0]]}}]}',
     "outside WGS84", "nan"),
]


@pytest.mark.parametrize(("text", "problem", "stem"), BROKEN, ids=[b[2] for b in BROKEN])
def test_read_geojson_refuses_broken_file(
    tmp_path: Path, text: str, problem: str, stem: str
) -> None:
    """Broken GeoJSON raises BadNetworkError naming the file and the problem."""
    path = tmp_path / f"{stem}.geojson"
    path.write_text(text)
    with pytest.raises(BadNetworkError) as info:
        read_geojson(path)
    message = str(info.value)
    assert message.startswith(f"{path}: ")
    assert problem in message


def test_read_geojson_missing_file(tmp_path: Path) -> None:
    """A missing path is refused, naming it."""
    with pytest.raises(BadNetworkError, match=r"gone\.geojson: no such file"):
        read_geojson(tmp_path / "gone.geojson")
