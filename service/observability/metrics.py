"""Prometheus metrics of one node, in a registry of its own (``prometheus-client``).

* ``diastolic_sr_associations_total{outcome}``: accepted / rejected
* ``diastolic_sr_objects_received_total{outcome}``: stored / rejected / discarded (images) /
  ignored (the node's own results coming back)
* ``diastolic_sr_studies_graded_total{outcome}``: what each study concluded, as a
  :class:`service.model.Outcome` token (normal, grade-1, grade-2, grade-3, indeterminate,
  not-gradable, atrial-fibrillation, special-situation), or why it has no result (rejected,
  error, retry)
* ``diastolic_sr_deliveries_total{outcome,kind}``: delivered / retry / failed, of a result SR
  or a summary PDF
* ``diastolic_sr_queue_depth{queue}``: studies waiting, deliveries pending, deliveries failed
  (read from the journal at each scrape)
* ``diastolic_sr_processing_seconds``: histogram, from the end of a study's settle window (its
  claim for grading) to its result being recorded
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

from prometheus_client import CollectorRegistry, Counter, Histogram, generate_latest
from prometheus_client.core import GaugeMetricFamily
from prometheus_client.registry import Collector

#: latency buckets, seconds (grading plus writing; the PDF summary is the slow part)
LATENCY_BUCKETS = (0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 120.0)


class QueueCollector(Collector):
    def __init__(self, depth: Callable[[], dict[str, int]]) -> None:
        self._depth = depth

    def collect(self) -> Iterator[GaugeMetricFamily]:
        g = GaugeMetricFamily(
            "diastolic_sr_queue_depth", "Work waiting in the journal", labels=["queue"]
        )
        try:
            depth = self._depth()
        except Exception:  # journal closed or busy: report nothing rather than fail the scrape
            depth = {}
        for name, value in sorted(depth.items()):
            g.add_metric([name], float(value))
        yield g


class Metrics:
    def __init__(self, registry: CollectorRegistry | None = None) -> None:
        self.registry = registry or CollectorRegistry()
        r = self.registry
        self.associations = Counter(
            "diastolic_sr_associations", "Association requests", ["outcome"], registry=r
        )
        self.objects = Counter(
            "diastolic_sr_objects_received", "Objects received by C-STORE", ["outcome"], registry=r
        )
        self.studies = Counter(
            "diastolic_sr_studies_graded", "Studies graded, by outcome", ["outcome"], registry=r
        )
        self.deliveries = Counter(
            "diastolic_sr_deliveries",
            "Delivery attempts, by outcome",
            ["outcome", "kind"],
            registry=r,
        )
        self.processing = Histogram(
            "diastolic_sr_processing_seconds",
            "Seconds from a study's claim for grading to its result being recorded",
            buckets=LATENCY_BUCKETS,
            registry=r,
        )
        self._queue: QueueCollector | None = None

    def watch_queue(self, depth: Callable[[], dict[str, int]]) -> None:
        if self._queue is not None:
            self.registry.unregister(self._queue)
        self._queue = QueueCollector(depth)
        self.registry.register(self._queue)

    def exposition(self) -> bytes:
        return generate_latest(self.registry)
