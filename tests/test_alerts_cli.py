"""`tocsin alerts` lists and shows the archive a replay wrote."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from tests.livenet import DEMO, SITES
from tocsin.alerts.packet import ParsedAlert, read_alert
from tocsin.alerts.skyplot import NoDirection, ellipse_outline, error_shape, sky_plot
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
    # the localisation picture: a PNG from the packet alone
    png = tmp_path / "sky" / "front.png"
    argv = ["alerts", "--archive", str(out / "alerts.sqlite"), "--show", ivorn]
    assert main([*argv, "--sky-plot", str(png)]) == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "sky plot written" in capsys.readouterr().err
    assert main(["alerts", "--archive", str(out / "alerts.sqlite"), "--sky-plot", "x.png"]) == 2
    assert "--sky-plot needs --show" in capsys.readouterr().err


def test_ellipse_outline_points_lie_on_the_ellipse_at_its_angle() -> None:
    """Each outline point has Mahalanobis distance k from the centre, and the farthest
    points lie at the position angle (north through east, as astropy measures it)."""
    major, minor, pa = 3.0, 1.0, 30.0
    east, north = ellipse_outline(major, minor, pa, k=2.0, n=721)
    p = math.radians(pa)
    along = north * math.cos(p) + east * math.sin(p)
    across = -north * math.sin(p) + east * math.cos(p)
    np.testing.assert_allclose((along / major) ** 2 + (across / minor) ** 2, 4.0, rtol=1e-12)
    far = int(np.argmax(east**2 + north**2))
    angle = math.degrees(math.atan2(east[far], north[far])) % 180.0
    assert angle == pytest.approx(pa, abs=0.5)
    assert math.hypot(east[far], north[far]) == pytest.approx(2.0 * major, rel=1e-4)


def test_sky_plot_refuses_an_alert_without_a_direction() -> None:
    alert = ParsedAlert("ivo://x/y#z", "test", {}, None, None, None, None, None, [])
    with pytest.raises(NoDirection, match="no fitted direction"):
        sky_plot(alert)


def test_sky_plot_of_a_packet_without_an_ellipse_draws_circles() -> None:
    """A packet from before the ellipse parameters (or another writer's): the plot
    falls back to circles of the packet's radius."""
    alert = ParsedAlert(
        "ivo://x/y#z", "observation", {"false_alarm_rate": "0.5"}, None, None, 150.0, 35.0, 0.2, []
    )
    assert error_shape(alert) == (0.2, 0.2, 0.0, "1σ and 2σ error circles")
    assert sky_plot(alert)[:4] == b"\x89PNG"
    alert.params.update(err_ellipse_major="0.3", err_ellipse_minor="0.1", err_ellipse_pa="40")
    assert error_shape(alert) == (0.3, 0.1, 40.0, "1σ and 2σ error ellipses")
