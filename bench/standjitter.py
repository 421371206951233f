"""Final answers of a 1 Hz vehicle that stands on a straight road, by GPS error model.

A van drives east on a straight two-way road at 10 m/s from 100 m to 475 m, stands
there 90 s, and drives on to 900 m (1 Hz fixes; 50 m segments). Its fixes carry a
first-order Gauss-Markov error (``livematch.sim.drive.gauss_markov``, time constant
45 s, as the simulator's default) plus white Gaussian error, per axis, in three mixes.
For each ``[matcher]`` setting the script prints the mean distance from the final
answers of the standing fixes to the true position, the median over all fixes, and the
largest step back along the road between consecutive final answers (all on the road's
x axis, so distances along it are x). What it shows: how ``monotone_final``'s bound
(a commit's answers no lower than the previous commit's last one) and
``monotone_pool``'s pooling behave where a stand is committed one or two fixes at a
time.

    PYTHONPATH=$PWD .venv/bin/python bench/standjitter.py [--seeds 12]
"""

from __future__ import annotations

import argparse

import numpy as np

from livematch.core.build import Road, network_from_roads
from livematch.core.events import Commit
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.sim.drive import gauss_markov

SETTINGS = {
    "default": MatchSettings(),
    "monotone_final": MatchSettings(monotone_final=True),
    "monotone_final+pool": MatchSettings(monotone_final=True, monotone_pool=True),
}
#: (Gauss-Markov sigma, white sigma) per axis, metres
NOISE = ((0.0, 4.0), (5.0, 0.0), (4.0, 1.5))
STAND = (475.0, 0.0)


def truth_points() -> list[tuple[float, float]]:
    """True positions, one a second: the drive in, the 90 s stand, the drive on."""
    xs = [*np.arange(100.0, 475.0, 10.0), *[475.0] * 90, *np.arange(485.0, 900.1, 10.0)]
    return [(float(x), 0.0) for x in xs]


def run(settings: MatchSettings, pts: list[tuple[float, float]]) -> dict[float, float]:
    """Each fix's final answer x (m) by fix time."""
    net = network_from_roads([Road([(float(x), 0.0) for x in range(0, 1001, 50)], way=1)])
    tracker = Tracker(net, "v", settings)
    events = []
    for i, (x, y) in enumerate(pts):
        events += tracker.update(Fix("v", float(i), 0.0, 0.0, x, y))
    events += tracker.flush()
    return {f.t: f.x for e in events if isinstance(e, Commit) for f in e.fixes}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", type=int, default=12)
    args = ap.parse_args(argv)
    truth = truth_points()
    stand = [i for i, p in enumerate(truth) if p == STAND]
    print("| Gauss-Markov / white sigma m | setting | stand mean err m | all median err m "
          "| worst step back m |")
    print("|---|---|---:|---:|---:|")
    for corr, white in NOISE:
        for name, settings in SETTINGS.items():
            stand_err: list[float] = []
            all_err: list[float] = []
            back = 0.0
            for seed in range(args.seeds):
                rng = np.random.default_rng(seed)
                n = len(truth)
                e = gauss_markov(rng, n, corr, 45.0, n_series=2) + rng.normal(0.0, white, (n, 2))
                pts = [(x + dx, y + dy) for (x, y), (dx, dy) in zip(truth, e, strict=True)]
                xs = run(settings, pts)
                stand_err += [abs(xs[float(i)] - STAND[0]) for i in stand]
                all_err += [abs(xs[float(i)] - truth[i][0]) for i in range(n)]
                back = max(back, *(xs[float(i)] - xs[float(i + 1)] for i in range(n - 1)))
            print(f"| {corr:g} / {white:g} | {name} | {np.mean(stand_err):.2f} | "
                  f"{np.median(all_err):.2f} | {max(back, 0.0):.2f} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
