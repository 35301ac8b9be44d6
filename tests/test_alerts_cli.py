"""`tocsin alerts` lists and shows the archive a replay wrote."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.livenet import DEMO, SITES
from tocsin.alerts.packet import read_alert
from tocsin.cli.main import main


def test_alerts_table_and_packet(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "r"
    assert main(["replay", str(DEMO), "--sites", str(SITES), "--out", str(out), "--quiet"]) == 0
    capsys.readouterr()
    assert main(["alerts", "--archive", str(out / "alerts.sqlite")]) == 0
    table = capsys.readouterr().out.splitlines()
    assert table[0].split()[:4] == ["seq", "ivorn", "kind", "level"]
    row = table[1].split()
    ivorn = row[1]
    assert ivorn.startswith("ivo://tocsin.example/alerts#c-") and row[2:4] == ["new", "internal"]
    assert row[-1] == "1/1"  # delivered to its one sink (the packet directory)
    assert main(["alerts", "--archive", str(out / "alerts.sqlite"), "--show", ivorn]) == 0
    xml = capsys.readouterr().out.encode()
    assert read_alert(xml.strip()).ivorn == ivorn
    assert main(["alerts", "--archive", str(out / "alerts.sqlite"), "--show", ivorn + "z"]) == 2
    assert "no archived alert" in capsys.readouterr().err
    assert main(["alerts", "--archive", str(tmp_path / "none.sqlite")]) == 2
