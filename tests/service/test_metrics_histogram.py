"""The per-bar histograms are plain counts exported at scrape time: what a scrape shows
must be what the client library's own histogram shows for the same observations."""

from __future__ import annotations

from prometheus_client import CollectorRegistry, Histogram

from barsmith.service.metrics import PlainHistogram, PlainHistograms

BUCKETS = (0.001, 0.0025, 0.01, 0.5, 1.0, 30.0)


def _samples(registry: CollectorRegistry) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    return {
        (sample.name, tuple(sorted(sample.labels.items()))): sample.value
        for family in registry.collect()
        for sample in family.samples
        if not sample.name.endswith("_created")  # the library's own convention
    }


def test_a_plain_histogram_scrapes_as_the_library_histogram() -> None:
    values = [0.0, 0.0005, 0.001, 0.0011, 0.0025, 0.3, 0.5, 0.75, 1.0, 29.9, 30.0, 31.0, 1e9]
    library = CollectorRegistry()
    reference = Histogram("barsmith_test_seconds", "A test histogram", buckets=BUCKETS, registry=library)
    ours = CollectorRegistry()
    plain = PlainHistogram("barsmith_test_seconds", "A test histogram", BUCKETS)
    ours.register(PlainHistograms([plain]))
    assert _samples(ours) == _samples(library)  # empty: every bucket at zero
    for value in values:
        reference.observe(value)
        plain.observe(value)
    assert _samples(ours) == _samples(library)
    assert plain.counts[-1] == 2  # above the last bound: only +Inf counts them
