"""The optional Prometheus endpoint: the health counters as ``streamcond_*`` metrics.

Turned on by ``[metrics] listen = "127.0.0.1:9108"`` (the extra ``metrics`` installs
``prometheus_client``). A custom collector reads a fresh :class:`~streamcond.health.Snapshot`
at each scrape, so the numbers are those of the scrape's moment and nothing is updated on the
hot path. Names and types follow the Prometheus naming conventions (base units — seconds,
bytes —, ``_total`` for counters, no rates: Prometheus derives those from the counters).
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from typing import Any

from .errors import ConfigError
from .health import Snapshot

log = logging.getLogger("streamcond.daemon")


def parse_listen(listen: str) -> tuple[str, int]:
    """``"host:port"``, ``":port"`` or ``"port"`` → (host, port); the host defaults to
    127.0.0.1 (metrics are for a local scraper or a tunnel unless the user says otherwise)."""
    host, sep, port = listen.rpartition(":")
    if not sep:
        host, port = "", listen
    host = host.strip("[]") or "127.0.0.1"
    try:
        p = int(port)
    except ValueError:
        raise ValueError(f"metrics.listen {listen!r} needs a port number (host:port)") from None
    if not 0 < p < 65536:
        raise ValueError(f"metrics.listen {listen!r}: the port must be 1-65535")
    return host, p


class _Collector:
    def __init__(self, snapshot: Callable[[], Snapshot]) -> None:
        self.snapshot = snapshot

    def describe(self) -> list[Any]:
        return []  # no collect() at registration time

    def collect(self) -> Any:
        from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

        s = self.snapshot()

        def counter(name: str, doc: str, value: float) -> Any:
            return CounterMetricFamily(name, doc, value=value)

        def gauge(name: str, doc: str, value: float | None) -> Any:
            return GaugeMetricFamily(name, doc, value=float("nan") if value is None else value)

        yield gauge("streamcond_uptime_seconds", "Seconds since the daemon started.", s.uptime_s)
        yield counter("streamcond_rows", "Rows (samples) read.", s.rows)
        yield counter("streamcond_bad_lines", "Input lines that did not parse.", s.bad_lines)
        yield counter("streamcond_long_lines", "Input lines dropped as over-long.", s.long_lines)
        edges = CounterMetricFamily("streamcond_edges", "Edges emitted, per channel.",
                                    labels=["channel"])
        for ch, n in s.edges.items():
            edges.add_metric([ch], n)
        yield edges
        yield gauge("streamcond_spool_depth", "Records stored and not yet acknowledged.",
                    s.spool_depth)
        yield gauge("streamcond_spool_oldest_age_seconds",
                    "Age of the oldest stored record (sample time; NaN when empty).",
                    s.spool_oldest_age_s)
        yield counter("streamcond_dropped", "Records dropped by the spool's overflow policy.",
                      s.dropped)
        yield counter("streamcond_reconnects", "MQTT connections made after the first.",
                      s.reconnects)
        yield gauge("streamcond_broker_connected", "1 while connected to the MQTT broker.",
                    1.0 if s.broker_connected else 0.0)
        yield gauge("streamcond_last_sample_age_seconds",
                    "Seconds since the latest row arrived (NaN before one).", s.last_sample_age_s)
        yield counter("streamcond_cpu_seconds", "CPU time of the daemon (user + system).",
                      s.cpu_s)
        yield gauge("streamcond_resident_memory_bytes", "Resident memory of the daemon.",
                    s.rss_bytes)
        if s.t is not None:
            yield gauge("streamcond_last_sample_time_seconds",
                        "Sample time of the latest conditioned sample.", s.t)


class MetricsServer:
    """Serves ``/metrics`` on ``listen`` in a background thread until :meth:`close`."""

    def __init__(self, listen: str, snapshot: Callable[[], Snapshot]) -> None:
        try:
            from prometheus_client import CollectorRegistry, start_http_server
        except ImportError:
            raise ConfigError(
                "metrics.listen is set but prometheus_client is not installed; install the "
                "extra: pip install 'streamcond[metrics]'"
            ) from None
        host, port = parse_listen(listen)
        registry = CollectorRegistry(auto_describe=False)
        registry.register(_Collector(snapshot))
        try:
            self.server, self.thread = start_http_server(port, addr=host, registry=registry)
        except OSError as e:
            raise ConfigError(
                f"metrics.listen {listen!r} cannot be served: {e.strerror or e}"
            ) from None
        self.address = (host, self.server.server_port)
        log.info("serving Prometheus metrics on http://%s:%d/metrics", host, self.address[1])

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()
