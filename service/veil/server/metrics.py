"""Prometheus metrics of one service process (its own registry, so several apps in one process never clash)."""

from __future__ import annotations

from bisect import bisect_left
from collections.abc import Iterator

from prometheus_client import CollectorRegistry, Counter, Gauge, generate_latest
from prometheus_client.metrics_core import CounterMetricFamily, HistogramMetricFamily, Metric
from prometheus_client.registry import Collector

DRIFT_LEVELS = {"ok": 0, "warn": 1, "alert": 2}
LATENCY_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0)


class RequestCounts(Collector):
    """``veil_requests_total{route,method,status}`` and the ``veil_request_seconds{route}`` histogram.

    Kept as plain counts in dicts keyed by route, method and status (nested,
    so recording builds no key), added up only when scraped: prometheus_client's
    labelled metrics look their child up by a fresh tuple and take a lock for
    every increment, which cost more than erasing one vector.  Requests are
    recorded on the event loop's thread only (the middleware runs there).
    """

    def __init__(self, buckets: tuple[float, ...] = LATENCY_BUCKETS) -> None:
        self.buckets = buckets
        self._requests: dict[str, dict[str, dict[int, int]]] = {}
        # route -> [count in each bucket (not cumulative), the last one +Inf; then the sum of seconds]
        self._latency: dict[str, list[float]] = {}

    def record(self, route: str, method: str, status: int, seconds: float) -> None:
        by_status = self._requests.setdefault(route, {}).setdefault(method, {})
        by_status[status] = by_status.get(status, 0) + 1
        latency = self._latency.get(route)
        if latency is None:
            latency = self._latency[route] = [0.0] * (len(self.buckets) + 2)
        latency[bisect_left(self.buckets, seconds)] += 1
        latency[-1] += seconds

    def collect(self) -> Iterator[Metric]:
        requests = CounterMetricFamily(
            "veil_requests", "HTTP requests by route template, method and status", labels=["route", "method", "status"]
        )
        for route, by_method in list(self._requests.items()):
            for method, by_status in list(by_method.items()):
                for status, count in list(by_status.items()):
                    requests.add_metric([route, method, str(status)], count)
        yield requests
        latency = HistogramMetricFamily("veil_request_seconds", "request latency by route template", labels=["route"])
        for route, counts in list(self._latency.items()):
            cumulative: list[tuple[str, float]] = []
            running = 0.0
            for bound, observed in zip((*map(str, self.buckets), "+Inf"), counts[:-1], strict=True):
                running += observed
                cumulative.append((bound, running))
            latency.add_metric([route], cumulative, sum_value=counts[-1])
        yield latency


class ServiceMetrics:
    """Requests and latency by route and status, vectors cleaned, versions served, reloads, drift status."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry()
        self.requests = RequestCounts()
        self.registry.register(self.requests)
        self.vectors = Counter(
            "veil_vectors", "vectors cleaned, by eraser and version", ["name", "version"], registry=self.registry
        )
        self._vector_counts: dict[str, dict[str, Counter]] = {}
        self.version_info = Gauge(
            "veil_version_info", "1 for the version each eraser serves at its alias", ["name", "alias", "version"],
            registry=self.registry,
        )  # fmt: skip
        self.reloads = Counter("veil_reloads", "versions loaded and swapped in", ["name"], registry=self.registry)
        self.reload_failures = Counter(
            "veil_reload_failures", "versions refused on reload (verification, dimension, I/O)", ["name"],
            registry=self.registry,
        )  # fmt: skip
        self.reload_failing = Gauge(
            "veil_reload_failing", "1 while the alias names a version this process refused (it serves the last good)",
            ["name"], registry=self.registry,
        )  # fmt: skip
        self.drift_status = Gauge(
            "veil_drift_status", "last drift check status: 0 ok, 1 warn, 2 alert", ["name"], registry=self.registry
        )

    def cleaned(self, name: str, version: str, count: int) -> None:
        """Count vectors cleaned, with the labelled child looked up once per version, not once per request."""
        children = self._vector_counts.setdefault(name, {})
        child = children.get(version)
        if child is None:
            child = children[version] = self.vectors.labels(name, version)
        child.inc(count)

    def served(self, name: str, alias: str, old_version: str | None, new_version: str) -> None:
        if old_version is not None:
            self.version_info.remove(name, alias, old_version)
        self.version_info.labels(name, alias, new_version).set(1)

    def render(self) -> bytes:
        return bytes(generate_latest(self.registry))
