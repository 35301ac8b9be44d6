"""Bad input over the wire: every kind of malformed message is refused with a reason,
counted by reason in the metrics, and nothing valid is lost; the service keeps running."""

from __future__ import annotations

import contextlib
import json
import random
import re
import signal
from collections import Counter
from pathlib import Path

import orjson
import pytest

from tests.livenet import (
    SITES,
    demo_lines,
    journal_lines,
    publish_sync,
    running_service,
    scrape,
    wait_journal,
    write_config,
)
from tests.mosquitto import Mosquitto, free_port
from tocsin.live import service as service_mod
from tocsin.model.service_config import MetricsConfig, ServiceConfig

pytestmark = [pytest.mark.broker, pytest.mark.slow]

MAX_BYTES = 65_536
REJECTED_METRIC = r'tocsin_batches_rejected_total\{reason="(\w+)"\} ([0-9.e+]+)'


def _malformed(rng: random.Random, good: list[dict[str, object]]) -> tuple[str, str, bytes]:
    """(expected reason, topic, payload) of one random malformed message."""
    b = dict(rng.choice(good))
    site = str(b["site"])
    topic = f"tocsin/site/{site}/hits"
    kind = rng.randrange(9)
    if kind == 0:
        raw = orjson.dumps(b)
        return "bad_json", topic, raw[: rng.randrange(1, len(raw) - 1)]
    if kind == 1:
        b["site"] = f"ghost-{rng.randrange(10**6)}"
        return "unknown_site", f"tocsin/site/{b['site']}/hits", orjson.dumps(b)
    if kind == 2:
        other = "kestrel-ridge" if site != "kestrel-ridge" else "hollow-creek-2"
        return "site_topic_mismatch", f"tocsin/site/{other}/hits", orjson.dumps(b)
    if kind == 3:
        return "too_large", topic, b"[" + b"1," * (MAX_BYTES // 2) + b"1]"
    if kind == 4:
        b[rng.choice(["seq", "v", "live", "t"])] = rng.choice(["x", 1.5, None, {"a": 1}, [[]]])
        reason = "bad_version" if "v" in b and b["v"] != 1 else "bad_schema"
        return reason, topic, orjson.dumps(b)
    if kind == 5:
        start = int(b["live"][0])  # type: ignore[index]
        b["t"] = [start + 9, start + 3]
        return "unsorted_hits", topic, orjson.dumps(b)
    if kind == 6:
        b["t"] = [int(b["live"][1]) + 7]  # type: ignore[index]
        return "hit_outside_live", topic, orjson.dumps(b)
    if kind == 7:
        b["t"] = [-rng.randrange(1, 10**9)]
        return "bad_schema", topic, orjson.dumps(b)
    nested = b"[" * 5000 + b"]" * 5000  # deeply nested: refused by the JSON parser
    return "bad_json", topic, nested


def test_a_thousand_bad_messages_mixed_with_good_ones(
    mosquitto: Mosquitto, tmp_path: Path, stack: contextlib.ExitStack
) -> None:
    rng = random.Random(20261202)
    good_lines = demo_lines()[:3000]
    good = [orjson.loads(x) for x in good_lines]
    bad = [_malformed(rng, good) for _ in range(1200)]
    # shuffle bad ones in between the good ones, keeping the good ones in order
    stream: list[bytes | tuple[str, bytes]] = list(good_lines)
    for _reason, topic, payload in bad:
        stream.insert(rng.randrange(len(stream) + 1), (topic, payload))
    port = free_port()
    cfg = write_config(tmp_path, mosquitto, metrics_port=port, max_message_bytes=MAX_BYTES)
    svc = running_service(stack, cfg)
    publish_sync(mosquitto.port, stream)
    wait_journal(tmp_path / "data", len(good))
    metrics = scrape(port)  # the service is still up and answering
    assert svc.proc is not None and svc.proc.poll() is None
    counted = {m.group(1): float(m.group(2)) for m in re.finditer(REJECTED_METRIC, metrics)}
    expected = Counter(r for r, _, _ in bad)
    assert counted == {k: float(v) for k, v in expected.items()}, (counted, expected)
    assert svc.stop(signal.SIGTERM) == 0
    journal = journal_lines(tmp_path / "data")
    assert {(j["site"], j["seq"]) for j in journal} == {(g["site"], g["seq"]) for g in good}
    rejected_log = (tmp_path / "data" / "rejected.jsonl").read_text()
    rejected = [json.loads(x) for x in rejected_log.splitlines()]
    assert len(rejected) == len(bad)
    assert all(r["reason"] and r["detail"] for r in rejected)


def test_the_rejection_log_is_rotated_not_grown_without_end(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A site that keeps sending bad batches: ``rejected.jsonl`` is moved to
    ``rejected.jsonl.1`` at its size limit (an older one is replaced), every refusal
    is still counted in the metrics, and the newest ones are in the current log."""
    monkeypatch.setattr(service_mod, "REJECTED_LOG_BYTES", 2_000)
    cfg = ServiceConfig(registry=SITES, data_dir=tmp_path / "data", metrics=MetricsConfig(port=0))
    svc = service_mod.Service(cfg)
    site = svc.registry.ids[0]
    try:
        for k in range(100):
            assert svc.on_hits(site, b'{"v": 1, "broken": %d' % k) is False
    finally:
        svc.close()
    log, old = svc.rej_path, svc.rej_path.with_name("rejected.jsonl.1")
    assert log.stat().st_size < 2_000 + 1_000 and 2_000 <= old.stat().st_size < 3_000
    n_kept = len(log.read_bytes().splitlines()) + len(old.read_bytes().splitlines())
    assert n_kept < 100  # the oldest went
    last = orjson.loads(log.read_bytes().splitlines()[-1])
    assert last["reason"] == "bad_json" and last["topic_site"] == site
    total = svc.metrics.registry.get_sample_value(
        "tocsin_batches_rejected_total", {"reason": "bad_json"}
    )
    assert total == 100
