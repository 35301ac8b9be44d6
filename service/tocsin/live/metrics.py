"""Prometheus metrics of the service, on their own registry (one per service object)."""

from __future__ import annotations

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, start_http_server

LATENCY_BUCKETS_S = (
    *(0.05, 0.1, 0.25, 0.5, 1.0, 2.0, 3.0, 3.25, 3.5, 3.75, 4.0, 4.5, 5.0),
    *(7.5, 10.0, 20.0, 60.0, 300.0),
)
"""Latency buckets (s): finer just past the default 3 s lateness allowance, where
candidates land."""


class Metrics:
    """Every metric the service exports (names start with ``tocsin_``)."""

    def __init__(self) -> None:
        r = self.registry = CollectorRegistry()
        self.batches = Counter(
            "tocsin_batches_accepted", "Hit batches accepted", ["site"], registry=r
        )
        self.hits = Counter(
            "tocsin_hits_accepted", "Hits in accepted batches", ["site"], registry=r
        )
        self.rejected = Counter(
            "tocsin_batches_rejected", "Messages refused, by reason", ["reason"], registry=r
        )
        self.duplicates = Counter(
            "tocsin_batches_duplicate", "Repeated sequence numbers dropped", ["site"], registry=r
        )
        self.gaps = Counter(
            "tocsin_sequence_gaps",
            "Sequence numbers skipped (lost until they turn up)",
            ["site"],
            registry=r,
        )
        self.late = Counter(
            "tocsin_batches_late", "Batches later than the lateness allowance", ["site"], registry=r
        )
        self.rate = Gauge(
            "tocsin_site_rate_hz", "Rolling rate estimate per site", ["site"], registry=r
        )
        self.live = Gauge(
            "tocsin_site_live", "1 while the site reports, 0 when it dropped", ["site"], registry=r
        )
        self.candidates = Counter(
            "tocsin_candidates", "Candidates written", ["trigger", "statistic"], registry=r
        )
        self.lag = Gauge(
            "tocsin_processing_lag_seconds", "Wall clock minus the engine's watermark", registry=r
        )
        self.latency = Histogram(
            "tocsin_candidate_latency_seconds",
            "From the moment a candidate's window closed to the candidate being written",
            buckets=LATENCY_BUCKETS_S,
            registry=r,
        )
        self.journal_lines = Counter(
            "tocsin_journal_lines", "Batches written to the journal", registry=r
        )
        self.checkpoints = Counter("tocsin_checkpoints", "Checkpoints written", registry=r)
        self.journal_bytes = Gauge(
            "tocsin_journal_bytes",
            "Bytes of journal on disk (at the latest checkpoint)",
            registry=r,
        )
        self.journal_segments_deleted = Counter(
            "tocsin_journal_segments_deleted",
            "Journal segments deleted as older than journal_keep_days",
            registry=r,
        )
        self.alerts = Counter(
            "tocsin_alerts",
            "Alerts archived, by kind (new/update/retraction), level and status (queued/held)",
            ["kind", "level", "status"],
            registry=r,
        )
        self.deliveries = Counter(
            "tocsin_alert_deliveries",
            "Alert delivery outcomes by sink (dir, mqtt, vtp)",
            ["sink", "outcome"],
            registry=r,
        )
        self.transport_subscribers = Gauge(
            "tocsin_transport_subscribers",
            "VOEvent transport subscribers connected now",
            registry=r,
        )
        self.transport_totals = Gauge(
            "tocsin_transport_totals",
            "Running totals of the VOEvent transport server (accepted, refused, sent, acked, "
            "naked, timed_out, overflows, disconnect_<reason> ...)",
            ["what"],
            registry=r,
        )
        self.connected = Gauge(
            "tocsin_broker_connected", "1 while connected to the broker", registry=r
        )

    def serve(self, host: str, port: int) -> None:
        """Expose ``/metrics`` on ``host:port`` (a daemon thread of prometheus_client)."""
        start_http_server(port, addr=host, registry=self.registry)
