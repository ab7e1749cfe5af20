"""Prometheus metrics, one registry per app so two apps in one process never share counters."""

from __future__ import annotations

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client.exposition import CONTENT_TYPE_LATEST

# Weights requests range from milliseconds (a small plan) to minutes (GiB of safetensors).
_LATENCY_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60, 120, 300)

MEDIA_TYPE = CONTENT_TYPE_LATEST


class ServiceMetrics:
    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        self.requests = Counter(
            "seedbed_http_requests",
            "HTTP requests answered, by route template, method and status code.",
            ["route", "method", "status"],
            registry=self.registry,
        )
        self.latency = Histogram(
            "seedbed_http_request_duration_seconds",
            "Time from receiving a request to sending the last byte of its response.",
            ["route"],
            buckets=_LATENCY_BUCKETS,
            registry=self.registry,
        )
        self.bytes_sent = Counter(
            "seedbed_http_response_body_bytes",
            "Response body bytes sent, by route template.",
            ["route"],
            registry=self.registry,
        )
        self.values_served = Counter(
            "seedbed_weight_values_served",
            "Weight values (array elements) fully streamed to clients, by format.",
            ["format"],
            registry=self.registry,
        )
        self.in_flight = Gauge(
            "seedbed_http_requests_in_flight",
            "Requests being handled right now.",
            registry=self.registry,
        )

    def observe(self, route: str, method: str, status: int, seconds: float, nbytes: int) -> None:
        self.requests.labels(route=route, method=method, status=str(status)).inc()
        self.latency.labels(route=route).observe(seconds)
        self.bytes_sent.labels(route=route).inc(nbytes)

    def render(self) -> bytes:
        return generate_latest(self.registry)
