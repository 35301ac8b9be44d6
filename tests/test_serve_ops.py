"""Operations of the live service: metrics, and a SIGTERM restart that resumes warm."""

from __future__ import annotations

import contextlib
import json
import re
import signal
from pathlib import Path

import pytest

from tests.livenet import (
    demo_lines,
    publish_sync,
    running_service,
    scrape,
    wait_journal,
    write_config,
)
from tests.mosquitto import Mosquitto, free_port

pytestmark = [pytest.mark.broker, pytest.mark.slow]


def _metric(text: str, name: str, labels: str = "") -> float | None:
    m = re.search(rf"^{name}{re.escape(labels)} ([0-9.e+-]+)$", text, re.M)
    return float(m.group(1)) if m else None


def _events(log: Path, name: str) -> list[dict[str, object]]:
    out = []
    for line in log.read_text().splitlines():
        if line.startswith("{"):
            obj = json.loads(line)
            if obj.get("event") == name:
                out.append(obj)
    return out


def test_metrics_and_warm_restart(
    mosquitto: Mosquitto, tmp_path: Path, stack: contextlib.ExitStack
) -> None:
    lines = demo_lines()[:9000]  # about four minutes of the 40-site demo network
    port = free_port()
    cfg = write_config(tmp_path, mosquitto, metrics_port=port)
    svc = running_service(stack, cfg)
    publish_sync(mosquitto.port, lines)
    wait_journal(tmp_path / "data", len(lines))
    import time

    time.sleep(1.5)  # one gauge refresh
    text = scrape(port)
    n_kestrel = sum(1 for x in lines if b'"kestrel-ridge"' in x)
    assert _metric(text, "tocsin_batches_accepted_total", '{site="kestrel-ridge"}') == n_kestrel
    assert (_metric(text, "tocsin_hits_accepted_total", '{site="kestrel-ridge"}') or 0) > 0
    rate = _metric(text, "tocsin_site_rate_hz", '{site="kestrel-ridge"}')
    assert rate is not None and rate > 0  # rolling estimate published per site
    assert _metric(text, "tocsin_site_live", '{site="kestrel-ridge"}') == 1.0
    assert _metric(text, "tocsin_broker_connected") == 1.0
    assert _metric(text, "tocsin_journal_lines_total") == len(lines)
    assert "tocsin_candidate_latency_seconds_bucket" in text
    assert "tocsin_processing_lag_seconds" in text
    assert svc.stop(signal.SIGTERM) == 0
    stopped = _events(svc.log, "stopped")
    assert stopped, "no clean stop"
    # restart: the checkpoint brings the rate estimates back, nothing to replay
    svc.start()
    svc.wait_connected()
    restored = _events(svc.log, "restored")[-1]
    assert restored["checkpoint"] is True
    assert restored["journal_lines_replayed"] == 0
    assert int(str(restored["sites_with_rates"])) >= 30
    assert svc.stop(signal.SIGTERM) == 0
