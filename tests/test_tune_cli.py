"""`tocsin tune` from the command line: its files, bad input, and a clean Ctrl-C."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
import tomllib
from pathlib import Path

import pytest

from tests.netsim import small_network
from tocsin.cli.main import main
from tocsin.gpstime import utc_to_gps_ns
from tocsin.sim import build_scenario, simulate, write_recording
from tocsin.types import NS_PER_S

QUICK_TOML = """
[engine.coincidence]
scales_s = [1e-6, 1e-4, 1e-2, 1.0]
[engine.excess]
scales_s = [1.0, 4.0, 16.0]
"""
"""Shorter windows than the defaults, so that 20 minutes hold many slides."""


@pytest.fixture(scope="module")
def inputs(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, Path]:
    tmp = tmp_path_factory.mktemp("tune-cli")
    reg, rates = small_network()
    sc = build_scenario(
        reg,
        seed=3,
        start_ns=utc_to_gps_ns("2026-07-01T00:00:00"),
        duration_ns=1200 * NS_PER_S,
        rates_hz=rates,
    )
    rec = tmp / "net.jsonl.gz"
    write_recording(simulate(sc), rec)
    sites = tmp / "sites.toml"
    sites.write_text(reg.to_toml())
    cfg = tmp / "quick.toml"
    cfg.write_text(QUICK_TOML)
    return rec, sites, cfg


def _args(inputs: tuple[Path, Path, Path], out: Path, *extra: str) -> list[str]:
    rec, sites, cfg = inputs
    return [
        "tune",
        str(rec),
        "--sites",
        str(sites),
        "--config",
        str(cfg),
        "--out",
        str(out),
        "--quiet",
        *extra,
    ]


def test_tune_writes_a_report_a_snippet_and_the_numbers(
    inputs: tuple[Path, Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "out"
    code = main(
        _args(
            inputs,
            out,
            "--slides",
            "3",
            "--fronts",
            "2",
            "--front-sites",
            "4,8",
            "--bursts",
            "2",
            "--burst-strengths",
            "0.01,1",
            "--target-far",
            "1e5",
        )
    )
    assert code == 0
    printed = capsys.readouterr().out
    assert "report" in printed and "bound far_per_year" in printed
    snippet = tomllib.loads((out / "thresholds.toml").read_text())
    bounds = snippet["alerts"]["public_far_per_year_by_trigger"]
    assert set(bounds) == {"coincidence", "excess"}
    assert all(v > 0 for v in bounds.values())
    page = (out / "report.html").read_text()
    assert page.count("data:image/png;base64,") == 3  # rates, efficiency, per-site rates
    for heading in (
        "Inputs",
        "Recommended thresholds",
        "False alarm rate",
        "Efficiency",
        "Per-site rates and dead time",
        "How to read it",
    ):
        assert heading in page
    summary = json.loads((out / "summary.json").read_text())
    assert len(summary["slides"]) == 3
    assert (
        summary["step_s"] * 1e9
        > summary["guard_s"] * 1e9
        >= summary["longest_coincidence_window_s"] * 1e9
    )
    kinds = {(i["kind"], i["value"]) for i in summary["injections"]}
    assert kinds == {("front", 4.0), ("front", 8.0), ("burst", 0.01), ("burst", 1.0)}
    lines = (out / "background.jsonl").read_text().splitlines()
    assert all(json.loads(x)["slide"] in (0, 1, 2) for x in lines)


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (("--slides", "0"), "--slides 0 must be at least 1"),
        (("--jobs", "0"), "--jobs 0 must be at least 1"),
        (("--front-sites", "1"), "must each be >= 2"),
        (("--burst-strengths", "a,b"), "is not a comma-separated list"),
        (("--step", "0.5"), "must be longer than the longest window"),
    ],
)
def test_bad_options_exit_2_with_a_reason(
    inputs: tuple[Path, Path, Path],
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    extra: tuple[str, ...],
    message: str,
) -> None:
    out = tmp_path / "out"
    assert main(_args(inputs, out, *extra)) == 2
    assert message in capsys.readouterr().err
    assert not out.exists()


def test_a_recording_too_short_for_the_default_windows_is_refused(
    inputs: tuple[Path, Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rec, sites, _ = inputs
    out = tmp_path / "out"
    code = main(["tune", str(rec), "--sites", str(sites), "--out", str(out), "--quiet"])
    assert code == 2
    err = capsys.readouterr().err
    assert "too short for time slides: 15 sites with hits need 16 slots" in err
    assert not out.exists()


def _processes_mentioning(text: str) -> list[int]:
    found = []
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                if text.encode() in (d / "cmdline").read_bytes():
                    found.append(int(d.name))
            except OSError:
                continue
    return found


def test_ctrl_c_stops_the_workers_and_writes_nothing(
    inputs: tuple[Path, Path, Path], tmp_path: Path
) -> None:
    out = tmp_path / "interrupted-out"
    args = _args(inputs, out, "--slides", "60", "--jobs", "2")
    args.remove("--quiet")  # the first stderr line says the recording is read
    proc = subprocess.Popen(
        [sys.executable, "-m", "tocsin.cli.main", *args],
        stderr=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )
    try:
        assert proc.stderr is not None
        first = proc.stderr.readline()
        assert first.startswith("tune: "), first
        time.sleep(2.0)  # let the workers start on their slides (not a measurement)
        assert proc.poll() is None
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 1
    assert "interrupted after" in err and "nothing written" in err, err
    assert not out.exists() or not any(out.iterdir())
    assert _processes_mentioning(str(out)) == []  # no worker left behind
