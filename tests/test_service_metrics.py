"""The daemon's metrics registry against prometheus_client's own types."""

from __future__ import annotations

from prometheus_client import CollectorRegistry, Histogram, generate_latest

from livematch.service.metrics import Metrics, PlainHistogram


def _text(registry: CollectorRegistry) -> list[str]:
    """Rendered lines, with the creation time (a wall clock reading) left out."""
    return [line for line in generate_latest(registry).decode().splitlines()
            if not line.startswith("x_seconds_created ")]


def test_plain_histogram_renders_as_prometheus_histogram() -> None:
    """PlainHistogram renders the same text as prometheus_client's Histogram (the
    reference) for the same values: below, on and between bounds, above every bound,
    zero and negative (prometheus_client puts a value equal to a bound in that bound's
    bucket)."""
    buckets = (0.0001, 0.00025, 0.001, 0.5, 1.0, 300.0)
    values = [0.0, -1.0, 0.0001, 0.00011, 0.00025, 0.3, 0.5, 0.5000001, 1.0, 299.9, 300.0,
              300.1, 1e9]
    plain, reference = CollectorRegistry(), CollectorRegistry()
    ours = PlainHistogram("x_seconds", "Example.", buckets, registry=plain)
    theirs = Histogram("x_seconds", "Example.", buckets=buckets, registry=reference)
    assert _text(plain) == _text(reference)  # empty
    for v in values:
        ours.observe(v)
        theirs.observe(v)
    assert _text(plain) == _text(reference)
    created = [line for line in generate_latest(plain).decode().splitlines()
               if line.startswith("x_seconds_created ")]
    assert len(created) == 1


def test_metrics_processing_and_lag_render_as_histograms() -> None:
    """The daemon's two per-message histograms appear with their buckets, count and
    sum in the exposition."""
    m = Metrics()
    m.processing.observe(0.0003)
    m.lag.observe(2.0)
    text = m.render().decode()
    assert 'livematch_processing_seconds_bucket{le="0.0005"} 1.0' in text
    assert "livematch_processing_seconds_count 1.0" in text
    assert "livematch_fix_to_publish_lag_seconds_sum 2.0" in text
    assert "# TYPE livematch_fix_to_publish_lag_seconds histogram" in text


def test_every_metric_is_documented() -> None:
    """Each metric the daemon registers is in the README's table and the module's list,
    under the name Prometheus exposes (``_total`` on counters, ``_info`` on info metrics:
    the OpenMetrics conventions prometheus_client follows)."""
    from pathlib import Path

    import livematch.service.metrics as module

    root = Path(__file__).resolve().parent.parent
    readme = (root / "README.md").read_text()
    listed = (module.__doc__ or "").split()
    suffix = {"counter": "_total", "info": "_info"}
    names = {family.name + suffix.get(family.type, "")
             for family in Metrics().registry.collect()}
    assert len(names) > 30
    for name in sorted(names):
        assert f"`{name}" in readme, f"{name}: not in README.md's metrics table"
        assert any(word.split("{")[0] == name for word in listed), \
            f"{name}: not in livematch/service/metrics.py's list"
