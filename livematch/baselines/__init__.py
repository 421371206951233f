"""Reference map matchers the benchmark compares livematch against.

- :mod:`livematch.baselines.nearest`: every fix snapped to the nearest segment (the floor).
- :mod:`livematch.baselines.hmm`: the hidden-Markov-model matcher of Newson & Krumm,
  "Hidden Markov Map Matching Through Noise and Sparseness" (ACM SIGSPATIAL GIS 2009),
  online with a fixed lag.

They are peers in ``bench/accuracy.py``, not production components: pure and
deterministic like the core, but written for clarity before speed.
"""

from __future__ import annotations

from livematch.baselines.hmm import HmmMatcher, HmmSettings, match_hmm
from livematch.baselines.nearest import match_nearest, snap
from livematch.baselines.result import Matched, TraceMatch, project_point

__all__ = [
    "HmmMatcher",
    "HmmSettings",
    "Matched",
    "TraceMatch",
    "match_hmm",
    "match_nearest",
    "project_point",
    "snap",
]
