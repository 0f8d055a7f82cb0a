"""Prometheus metrics: one registry per app (no global state), ``/metrics`` renders it.

``install_metrics(app, db, settings)`` (called by ``create_app``) builds a :class:`Metrics` with its
own ``CollectorRegistry``, adds the HTTP latency middleware and keeps the object on
``app.state.metrics``. Series (all prefixed ``halfwatch_``):

- ``http_request_duration_seconds{method,route,status}``: histogram; ``route`` is the route
  template (``/api/v1/points/{point_id}/records``), never the raw path, so ids do not explode it;
  unmatched paths are ``route="unmatched"``.
- read from the database at scrape time (``server.ops.store_metrics``): ``records_ingested_total
  {origin}``, ``jobs{state}``, ``job_oldest_age_seconds``, ``alarms{level}``,
  ``alarm_transitions_total{level}``, ``outbox_messages{status}``, ``outbox_oldest_age_seconds``,
  ``services_live{kind}``, ``worker_heartbeat_age_seconds``, ``analysis_duration_seconds``
  (histogram merged over all workers' heartbeats), ``mqtt_bridges_connected``,
  ``mqtt_messages_total{outcome}``, ``mqtt_rejects_total{code}``, ``mqtt_disconnects_total``,
  ``database_up``.
- the process collector's ``process_*`` series for the API process.
"""

from __future__ import annotations

import time

from prometheus_client import CollectorRegistry, Histogram, ProcessCollector
from prometheus_client.exposition import choose_encoder

from server.ops.store_metrics import StoreCollector

HTTP_BUCKETS_S = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)


class Metrics:
    def __init__(self, db, settings):
        self.registry = CollectorRegistry()
        self.http_latency = Histogram(
            "halfwatch_http_request_duration_seconds",
            "HTTP request latency until the response is sent, by route template",
            ["method", "route", "status"], buckets=HTTP_BUCKETS_S, registry=self.registry)
        self.store = StoreCollector(db, settings)
        self.registry.register(self.store)
        ProcessCollector(registry=self.registry)

    def render(self, accept: str | None) -> tuple[bytes, str]:
        """The exposition in the format the scraper asked for (Prometheus text by default)."""
        encoder, content_type = choose_encoder(accept or "")
        return encoder(self.registry), content_type


class LatencyMiddleware:
    """Pure ASGI middleware: time each HTTP request and label it by its route template."""

    def __init__(self, app, metrics: Metrics):
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)
        t0 = time.perf_counter()
        status = {"code": 500}

        async def timed_send(message):
            if message["type"] == "http.response.start":
                status["code"] = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, timed_send)
        finally:
            route = scope.get("route")
            template = getattr(route, "path", None) or "unmatched"
            self.metrics.http_latency.labels(scope.get("method", ""), template,
                                             str(status["code"])).observe(time.perf_counter() - t0)


def install_metrics(app, db, settings) -> Metrics:
    metrics = Metrics(db, settings)
    app.state.metrics = metrics
    app.add_middleware(LatencyMiddleware, metrics=metrics)
    return metrics
