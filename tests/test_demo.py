"""`tocsin demo`: the whole chain on one machine finds its injected front in under a minute."""

from __future__ import annotations

import json
import time
from pathlib import Path

import pytest

from tocsin.cli.main import main

pytestmark = pytest.mark.slow


def test_demo_finds_its_front(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    t0 = time.monotonic()
    assert main(["demo", "--workdir", str(tmp_path), "--timeout", "60", "--seed", "20261202"]) == 0
    elapsed = time.monotonic() - t0  # reported, not asserted: a test never checks speed
    out = capsys.readouterr().out
    assert "<- the injected front" in out
    cands = [
        json.loads(x) for x in (tmp_path / "data" / "candidates.jsonl").read_text().splitlines()
    ]
    fronts = [c for c in cands if c["statistic"] == "front" and c["multiplicity"] >= 6]
    assert fronts and fronts[0]["far_per_year"] < 365.25
    assert fronts[0]["ra_deg"] is not None
    print(f"demo took {elapsed:.0f} s")
