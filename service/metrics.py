"""Prometheus metrics of one application: requests, latencies, the served index and generation.

Each application has its own registry, so several apps in one process (tests) do not collide.
Routes are labelled by their rule (``/v1/images/<int:image_id>``), never by the raw path, so
the number of series stays small whatever clients ask for.
"""

from __future__ import annotations

from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, Counter, Gauge, Histogram, generate_latest

LATENCY_BUCKETS = (0.002, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)


class Metrics:
    def __init__(self):
        self.registry = CollectorRegistry()
        r = self.registry
        self.requests = Counter("nearsight_http_requests", "HTTP requests answered, by route and status",
                                ["method", "route", "status"], registry=r)
        self.latency = Histogram("nearsight_http_request_duration_seconds", "Time to answer a request",
                                 ["method", "route"], buckets=LATENCY_BUCKETS, registry=r)
        self.in_flight = Gauge("nearsight_http_requests_in_flight", "Requests being answered now", registry=r)
        self.index_size = Gauge("nearsight_index_vectors", "Vectors in the served generation's index", registry=r)
        self.groups = Gauge("nearsight_groups", "Duplicate groups in the served generation", registry=r)
        self.generation = Gauge("nearsight_generation_info", "The generation being served (value 1)",
                                ["generation", "model"], registry=r)
        self.published = Gauge("nearsight_generation_published_timestamp_seconds",
                               "When the served generation was published (Unix time)", registry=r)
        self.swaps = Counter("nearsight_generation_swaps", "Generations swapped in since the service started",
                             registry=r)
        self.load_failures = Counter("nearsight_generation_load_failures",
                                     "Published generations that could not be loaded (the old one kept serving)",
                                     registry=r)

    def observe(self, method: str, route: str, status: int, seconds: float) -> None:
        self.requests.labels(method, route, str(status)).inc()
        self.latency.labels(method, route).observe(seconds)

    def on_snapshot(self, snapshot, *, swapped: bool) -> None:
        self.generation.clear()
        self.generation.labels(snapshot.name, snapshot.model).set(1)
        self.index_size.set(snapshot.size)
        self.groups.set(len(snapshot.groups))
        self.published.set(float(snapshot.generation.meta.get("published_at") or 0))
        if swapped:
            self.swaps.inc()

    def exposition(self) -> tuple[bytes, str]:
        return generate_latest(self.registry), CONTENT_TYPE_LATEST
