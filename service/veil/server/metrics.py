"""Prometheus metrics of one service process (its own registry, so several apps in one process never clash)."""

from __future__ import annotations

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest

DRIFT_LEVELS = {"ok": 0, "warn": 1, "alert": 2}


class ServiceMetrics:
    """Requests and latency by route and status, vectors cleaned, versions served, reloads, drift status."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry()
        self.requests = Counter(
            "veil_requests", "HTTP requests by route template, method and status", ["route", "method", "status"],
            registry=self.registry,
        )  # fmt: skip
        self.latency = Histogram(
            "veil_request_seconds", "request latency by route template", ["route"], registry=self.registry,
            buckets=(0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0),
        )  # fmt: skip
        self.vectors = Counter(
            "veil_vectors", "vectors cleaned, by eraser and version", ["name", "version"], registry=self.registry
        )
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

    def served(self, name: str, alias: str, old_version: str | None, new_version: str) -> None:
        if old_version is not None:
            self.version_info.remove(name, alias, old_version)
        self.version_info.labels(name, alias, new_version).set(1)

    def render(self) -> bytes:
        return bytes(generate_latest(self.registry))
