"""An invented demo world: the town of Larkmoor, its buses and vans, and sample feeds.

* :mod:`livematch.demo.town`: the generated road network and named places (pure).
* :mod:`livematch.demo.scenario`: bus lines, delivery vans, geofences and scripted
  incidents, as position messages plus truth (pure, seeded).
* :mod:`livematch.demo.samples`: writes the sample files of ``replay_logs/`` (the only
  module here that does I/O; ``scripts/make_samples`` runs it).

Everything is made up: no real town, street or company is meant.
"""
