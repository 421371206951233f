"""``livematch network``: compile a road map and describe a network.

``livematch network build SOURCE -o OUT`` imports an OpenStreetMap (PBF/XML) or GeoJSON
file and writes the compiled ``.lmnet`` file; ``livematch network info NET`` prints
counts, extent, road length by class and connectivity of a source or compiled file.
"""

from __future__ import annotations

import argparse
import json
import sys
from datetime import UTC, datetime
from typing import Any

from livematch.errors import BadNetworkError
from livematch.mapdata.netfile import open_network_detailed, save_network
from livematch.mapdata.options import DEFAULT_HIGHWAYS, TRANSPORT_MODES, ImportOptions
from livematch.mapdata.summary import network_summary


def register(subparsers: Any) -> None:
    """Add the ``network`` command family to the CLI."""
    parser = subparsers.add_parser("network", help="compile and inspect road networks")
    sub = parser.add_subparsers(dest="network_command", metavar="SUBCOMMAND")
    sub.required = True

    build = sub.add_parser(
        "build", help="import a map (OpenStreetMap PBF/XML or GeoJSON) into a .lmnet file"
    )
    build.add_argument("source", metavar="SOURCE", help="map file (.osm.pbf, .osm, .geojson)")
    build.add_argument("-o", "--output", required=True, metavar="OUT",
                       help="compiled network file to write (e.g. city.lmnet)")
    _add_import_options(build)
    build.set_defaults(func=_build)

    info = sub.add_parser("info", help="describe a map source or compiled network")
    info.add_argument("net", metavar="NET", help="map file or compiled .lmnet file")
    info.add_argument("--json", action="store_true", help="print one JSON object")
    _add_import_options(info)
    info.set_defaults(func=_info)


def _add_import_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--highways", metavar="LIST",
        help="comma-separated OSM highway classes to keep (default: "
             + ",".join(DEFAULT_HIGHWAYS) + ")",
    )
    parser.add_argument("--no-service", action="store_true",
                        help="leave out highway=service (driveways, parking aisles)")
    parser.add_argument("--transport-mode", choices=TRANSPORT_MODES, default="motor_vehicle",
                        help="whose roads: motor_vehicle (default) or bus (also ways open "
                             "to buses only: bus gates and terminals, highway=busway, "
                             "contraflow bus lanes)")
    parser.add_argument("--projection", choices=("local", "utm"), default="local",
                        help="local azimuthal equidistant (default) or the UTM zone")
    parser.add_argument("--epsg", type=int, metavar="N",
                        help="project to this EPSG code instead (must be in metres)")


def _options(args: argparse.Namespace) -> ImportOptions:
    highways = DEFAULT_HIGHWAYS
    if args.highways is not None:
        highways = tuple(h.strip() for h in args.highways.split(",") if h.strip())
        if not highways:
            raise BadNetworkError(f"--highways {args.highways!r} names no class")
    return ImportOptions(highways=highways, include_service=not args.no_service,
                         projection=args.projection, epsg=args.epsg,
                         transport_mode=args.transport_mode)


def _build(args: argparse.Namespace) -> int:
    opened = open_network_detailed(args.source, _options(args))
    if opened.kind == "lmnet":
        raise BadNetworkError(f"{args.source}: already a compiled network; give a map source")
    built_at = datetime.now(UTC).isoformat(timespec="seconds")
    save_network(opened.network, args.output, options=opened.options, stats=opened.stats,
                 built_at=built_at)
    net = opened.network
    if opened.stats:
        for note in opened.stats.notes:
            print(f"livematch: note: {args.source}: {note}", file=sys.stderr)
    print(f"wrote {args.output}: {net.n_vertices} vertices, {net.n_segments} directed "
          f"segments, {len(net.roads)} roads ({net.projection.crs})")
    return 0


def _info(args: argparse.Namespace) -> int:
    opened = open_network_detailed(args.net, _options(args))
    facts = network_summary(opened.network)
    facts["kind"] = opened.kind
    facts["built_at"] = opened.built_at
    facts["import"] = opened.stats.to_json() if opened.stats else None
    facts["options"] = opened.options.to_json() if opened.options else None
    if args.json:
        print(json.dumps(facts, ensure_ascii=False, sort_keys=True))
        return 0
    print(_render(args.net, facts))
    return 0


#: How ``network info`` names each transport mode's vehicles.
_PLURAL = {"motor_vehicle": "motor vehicles", "bus": "buses"}


def _render(name: str, facts: dict[str, Any]) -> str:
    lines = [
        f"network     {name} ({facts['kind']}; {facts['source']})",
        f"projection  {facts['projection']}",
        f"vertices    {facts['vertices']}",
        f"segments    {facts['segments']} directed "
        f"({facts['segments_without_reverse']} without a reverse twin)",
        f"ways        {facts['ways']} ({facts['roads']} roads)",
    ]
    if facts["bbox_wgs84"]:
        w, s, e, n = facts["bbox_wgs84"]
        lines.append(f"extent      lon {w:.6f} .. {e:.6f}, lat {s:.6f} .. {n:.6f} (WGS84)")
    lines.append(f"largest strongly connected component: "
                 f"{100 * facts['largest_scc_segment_share']:.1f} % of segments")
    lines.append("road length by highway class (km; a two-way road counted once):")
    for cls, metres in facts["length_m_by_highway"].items():
        lines.append(f"  {cls:<16}{metres / 1000:10.3f}")
    lines.append(f"  {'total':<16}{facts['length_m_total'] / 1000:10.3f}")
    stats = facts.get("import")
    mode = (facts.get("options") or {}).get("transport_mode", "motor_vehicle")
    if stats and stats["source_format"] == "geojson":
        lines.append(f"import      {stats['ways_seen']} features, {stats['ways_kept']} kept")
    elif stats:
        lines.append(
            f"import      {stats['ways_seen']} seen, {stats['ways_kept']} kept, "
            f"{stats['excluded_class']} other classes, {stats['excluded_access']} closed to "
            f"{_PLURAL.get(mode, mode)}, {stats['ways_clipped']} clipped at "
            f"{stats['missing_node_refs']} missing nodes, {stats['degenerate']} left with "
            "no segment"
        )
    if facts.get("built_at"):
        lines.append(f"built at    {facts['built_at']}")
    return "\n".join(lines)
