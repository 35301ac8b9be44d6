"""``tocsin followup``: an outside packet against a simulated recording with injections."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tests.extpackets import BILLION_LAUGHS, external_packet
from tests.netsim import followup_network
from tocsin.alerts.packet import read_alert
from tocsin.alerts.safexml import check_voevent
from tocsin.cli.main import main
from tocsin.types import NS_PER_S

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def recording(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, dict[str, object]]:
    d = tmp_path_factory.mktemp("fu-rec")
    reg = followup_network()
    sites = d / "sites.toml"
    sites.write_text(reg.to_toml())
    rec = d / "rec.jsonl.gz"
    args = ["simulate", "--sites", str(sites), "--hours", "0.5", "--out", str(rec), "--seed", "3"]
    args += ["--inject", "front:at=900,ra=150,dec=35,sites=5"]
    args += ["--inject", "burst:at=1400,dur=20,boost=4,sites=5"]
    assert main(args) == 0
    truth = json.loads((d / "rec.truth.json").read_text())
    return sites, rec, truth


def _config(d: Path) -> Path:
    cfg = d / "c.toml"
    cfg.write_text(
        '[alerts]\nrole = "test"\n'
        '[followup]\nauthors = ["*"]\n'
        "[followup.windows.gw]\nbefore_s = 30.0\nafter_s = 30.0\n"
        "[followup.windows.gamma]\nbefore_s = 10.0\nafter_s = 50.0\n"
    )
    return cfg


def _run(
    tmp: Path, packet: bytes, rec: tuple[Path, Path, dict[str, object]], *extra: str
) -> tuple[int, dict[str, object]]:
    sites, recording, _ = rec
    p = tmp / "ext.xml"
    p.write_bytes(packet)
    out = tmp / "out"
    code = main(
        [
            "followup",
            str(p),
            "--recording",
            str(recording),
            "--sites",
            str(sites),
            "--config",
            str(_config(tmp)),
            "--out",
            str(out),
            "--quiet",
            *extra,
        ]
    )
    lines = (out / "followups.jsonl").read_text().splitlines() if out.exists() else []
    return code, json.loads(lines[-1]) if lines else {}


def test_front_found_around_outside_time(
    tmp_path: Path, recording: tuple[Path, Path, dict[str, object]]
) -> None:
    start = int(recording[2]["start_gps_ns"])  # type: ignore[call-overload]
    t = start + 900 * NS_PER_S + 3 * NS_PER_S // 10  # the outside time is 0.3 s off the front
    code, rec = _run(tmp_path, external_packet("G1", t, ra_dec_err=(150.0, 35.0, 3.0)), recording)
    assert code == 0
    assert rec["outcome"] == "detection"
    best = rec["best"]
    assert isinstance(best, dict) and best["statistic"] in ("directed", "front")
    assert abs(int(best["time_gps_ns"]) - (start + 900 * NS_PER_S)) < 50_000_000
    assert float(rec["p_value"]) < 1e-6  # type: ignore[arg-type]
    assert int(rec["offsource_excluded"]) >= 1  # type: ignore[call-overload]  # the burst
    [pkt] = (tmp_path / "out").glob("fu-*.xml")
    check_voevent(pkt.read_bytes())  # valid VOEvent 2.0
    assert read_alert(pkt.read_bytes()).params["followup_outcome"] == "detection"


def test_burst_found_by_counts(
    tmp_path: Path, recording: tuple[Path, Path, dict[str, object]]
) -> None:
    start = int(recording[2]["start_gps_ns"])  # type: ignore[call-overload]
    t = start + 1395 * NS_PER_S
    code, rec = _run(tmp_path, external_packet("B1", t, stream="grb", messenger="gamma"), recording)
    assert code == 0
    assert rec["outcome"] == "detection", rec
    assert str(rec["best"]["statistic"]).startswith("count")  # type: ignore[index]
    assert rec["observed"]["network"] > rec["expected"]["network"]  # type: ignore[index,operator]


def test_quiet_moment_gives_upper_limits(
    tmp_path: Path, recording: tuple[Path, Path, dict[str, object]]
) -> None:
    start = int(recording[2]["start_gps_ns"])  # type: ignore[call-overload]
    code, rec = _run(tmp_path, external_packet("Q1", start + 600 * NS_PER_S), recording, "--plot")
    assert code == 0
    assert rec["outcome"] == "upper_limit"
    assert rec["p_value_calibration"] == "offsource" and int(rec["offsource_windows"]) >= 10  # type: ignore[call-overload]
    [png] = (tmp_path / "out").glob("fu-*.png")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert set(rec["upper_limit_90"]) == {
        "fen-a",
        "fen-b",
        "fen-c",
        "fen-d",
        "fen-e",
        "moor-f",
        "network",
    }  # type: ignore[arg-type]


def test_time_outside_the_recording_says_so(
    tmp_path: Path, recording: tuple[Path, Path, dict[str, object]]
) -> None:
    end = int(recording[2]["end_gps_ns"])  # type: ignore[call-overload]
    code, rec = _run(tmp_path, external_packet("L1", end + 3600 * NS_PER_S), recording)
    assert code == 0
    assert rec["outcome"] == "no_data" and "after the end" in str(rec["note"])


def test_hostile_packet_is_refused_with_exit_2(
    tmp_path: Path,
    recording: tuple[Path, Path, dict[str, object]],
    capsys: pytest.CaptureFixture[str],
) -> None:
    code, _ = _run(tmp_path, BILLION_LAUGHS, recording)
    assert code == 2
    assert "doctype" in capsys.readouterr().err
