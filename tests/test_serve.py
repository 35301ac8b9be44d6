"""The live service against a real Mosquitto: live equals replay, faults lose nothing."""

from __future__ import annotations

import contextlib
import json
import signal
from pathlib import Path

import pytest

from tests.livenet import (
    SITES,
    demo_lines,
    journal_lines,
    publish_sync,
    running_service,
    wait_journal,
    write_config,
)
from tests.mosquitto import Mosquitto
from tocsin.cli.main import main

pytestmark = [pytest.mark.broker, pytest.mark.slow]


def _replay_journal(data: Path, out: Path) -> list[dict[str, object]]:
    rec = out / "journal.jsonl"
    out.mkdir(parents=True, exist_ok=True)
    rec.write_bytes(b"".join(p.read_bytes() for p in sorted((data / "journal").glob("*.jsonl"))))
    assert main(["replay", str(rec), "--sites", str(SITES), "--out", str(out), "--quiet"]) == 0
    return _cands(out / "candidates.jsonl")


def _cands(path: Path) -> list[dict[str, object]]:
    return [json.loads(x) for x in path.read_text().splitlines()] if path.exists() else []


def _key(c: dict[str, object]) -> tuple[object, ...]:
    return (c["id"], c["revision"], c["far_per_year"], tuple(c["sites"]))  # type: ignore[arg-type]


def test_live_equals_replay_and_sigkill_loses_nothing(
    mosquitto: Mosquitto, tmp_path: Path, stack: contextlib.ExitStack
) -> None:
    lines = demo_lines()
    all_keys = {(json.loads(x)["site"], json.loads(x)["seq"]) for x in lines}
    cfg = write_config(tmp_path, mosquitto)
    data = tmp_path / "data"
    svc = running_service(stack, cfg)
    third = len(lines) // 3
    publish_sync(mosquitto.port, lines[:third])
    wait_journal(data, third // 2)
    svc.stop(signal.SIGKILL)  # crash mid-stream
    publish_sync(mosquitto.port, lines[third : 2 * third])  # queued by the broker meanwhile
    svc.start()
    svc.wait_connected()
    publish_sync(mosquitto.port, lines[2 * third :])
    wait_journal(data, len(all_keys))
    assert svc.stop(signal.SIGTERM) == 0
    journal = journal_lines(data)
    assert {(j["site"], j["seq"]) for j in journal} == all_keys  # every seq accounted for
    live = _cands(data / "candidates.jsonl")
    keys = [(c["id"], c["revision"]) for c in live]
    assert len(keys) == len(set(keys))  # no candidate twice
    replayed = _replay_journal(data, tmp_path / "replay")
    assert sorted(map(_key, live)) == sorted(map(_key, replayed))
    # the injected front is among them
    assert any(c["statistic"] == "front" and c["multiplicity"] == 6 for c in live)


def test_broker_restart_mid_stream_loses_nothing(
    mosquitto: Mosquitto, tmp_path: Path, stack: contextlib.ExitStack
) -> None:
    lines = demo_lines()[:4000]
    all_keys = {(json.loads(x)["site"], json.loads(x)["seq"]) for x in lines}
    cfg = write_config(tmp_path, mosquitto)
    data = tmp_path / "data"
    svc = running_service(stack, cfg)
    half = len(lines) // 2
    publish_sync(mosquitto.port, lines[:half])
    mosquitto.restart()  # clean stop: the broker saves queued messages
    publish_sync(mosquitto.port, lines[half:])
    wait_journal(data, len(all_keys))
    assert svc.stop(signal.SIGTERM) == 0
    assert {(j["site"], j["seq"]) for j in journal_lines(data)} == all_keys
    assert b'"broker_unreachable"' in (tmp_path / "serve.log").read_bytes()
