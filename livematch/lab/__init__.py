"""The replay lab: record a feed, replay it under several settings, compare and report.

* :mod:`~livematch.lab.record`: :class:`RecordingTap`, which writes every received
  message (rejected ones too) to a replay log, rotating by size or receive time; used by
  ``livematch record`` and by the daemon's ``--record``.
* :mod:`~livematch.lab.pace`: pacing a replay by the log's receive times (``--speed``)
  and publishing a log into a broker (``--publish``).
* :mod:`~livematch.lab.truth`: the truth file (:func:`livematch.sim.logs.read_truth`)
  turned into scores: road-and-direction accuracy, route mismatch, alert detection.
* :mod:`~livematch.lab.compare`: one replay per setting on the same log, with the numbers
  an engineer tunes by (eps shares, commit lag, alerts, µs per fix).
* :mod:`~livematch.lab.diff`: where two settings gave a different road or alert.
* :mod:`~livematch.lab.report`: the comparison table (terminal, Markdown, JSON) and the
  self-contained HTML report with maps and timelines.

Everything here is shell code (files, clocks, MQTT); the matching itself stays in
:mod:`livematch.core` and :mod:`livematch.pipeline`, so a lab run produces exactly the
records ``livematch replay`` and the daemon produce.
"""
