"""The network simulator, its shipped scenario and ``tocsin simulate``.

Short runs only (two to three minutes of simulated time); the statistical checks
use Poisson tolerances, the geometric ones astropy, both named beside each check.
"""

from __future__ import annotations

import dataclasses
import itertools
import json
import re
import shlex
from collections import defaultdict
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from astropy import units as u
from astropy.constants import c as astropy_c
from astropy.coordinates import ITRS, AltAz, EarthLocation, SkyCoord
from astropy.time import Time

from tocsin.cli import main as cli_main
from tocsin.cli import simulate as sim_cli
from tocsin.gpstime import utc_to_gps_ns
from tocsin.io.recording import Rejected, read_recording
from tocsin.model.batch import HitBatch
from tocsin.model.registry import Site, SiteRegistry
from tocsin.sim import (
    SHIPPED_RATES_HZ,
    SHIPPED_SITES,
    BurstSpec,
    FrontSpec,
    build_scenario,
    parse_injection,
    shipped_registry,
    simulate,
    truth_path_for,
    write_recording,
    write_truth,
)

REPO = Path(__file__).resolve().parent.parent
S = 10**9
START = "2026-03-14T00:00:00Z"
START_NS = utc_to_gps_ns(START)
FRONT = "front:at=75,ra=150,dec=35,sites=6"
BURST = "burst:at=20,dur=40,boost=1.0,sites=6"
C_M_PER_S = float(astropy_c.to_value(u.m / u.s))  # SI definition, via astropy.constants


def _run_cli(argv: list[str], monkeypatch: pytest.MonkeyPatch) -> int:
    """``tocsin ARGV`` through the real entry point (it imports only the named
    command's module)."""
    return cli_main.main(argv)


def _read(path: Path, reg: SiteRegistry) -> list[HitBatch]:
    out: list[HitBatch] = []
    for item in read_recording(path, reg):
        assert not isinstance(item, Rejected), item
        out.append(item)
    return out


def _by_site(batches: list[HitBatch]) -> dict[str, list[HitBatch]]:
    d: dict[str, list[HitBatch]] = defaultdict(list)
    for b in batches:
        d[b.site].append(b)
    for v in d.values():
        v.sort(key=lambda b: b.seq)
    return d


@pytest.fixture(scope="module")
def recording(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, Any]]:
    """150 s of the shipped network, a front, a burst and 2 % late batches."""
    out = tmp_path_factory.mktemp("sim") / "rec.jsonl.gz"
    sc = build_scenario(
        shipped_registry(), seed=11, start_ns=START_NS, duration_ns=150 * S, late_fraction=0.02
    )
    sim = simulate(sc, [parse_injection(FRONT), parse_injection(BURST)])
    write_recording(sim, out)
    truth = json.loads(write_truth(sim, out).read_text())
    return out, truth


@pytest.fixture(scope="module")
def batches(recording: tuple[Path, dict[str, Any]]) -> list[HitBatch]:
    return _read(recording[0], shipped_registry())


# -- reproducibility and format -------------------------------------------------


def test_same_seed_same_bytes_other_seed_differs(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    sites = REPO / "replay_data" / "network.toml"
    paths = {}
    for name, seed in (("a", "5"), ("b", "5"), ("c", "6")):
        (tmp_path / name).mkdir()
        out = tmp_path / name / "r.jsonl.gz"
        argv = [
            "simulate",
            "--sites",
            str(sites),
            "--hours",
            "0.02",
            "--seed",
            seed,
            "--inject",
            "front:at=30,ra=150,dec=35",
            "--out",
            str(out),
            "--quiet",
        ]
        assert _run_cli(argv, monkeypatch) == 0
        paths[name] = out
    a, b, c = (paths[k].read_bytes() for k in "abc")
    assert a == b
    assert truth_path_for(paths["a"]).read_bytes() == truth_path_for(paths["b"]).read_bytes()
    assert a != c


def test_every_line_parses_and_counts_match(
    recording: tuple[Path, dict[str, Any]], batches: list[HitBatch]
) -> None:
    _, truth = recording
    assert len(batches) == truth["n_batches"] > 0
    assert sum(b.n_hits for b in batches) == truth["n_hits"]
    assert {b.site for b in batches} <= set(SHIPPED_RATES_HZ)


def test_seq_runs_from_zero_without_gaps_and_live_intervals_follow_on(
    batches: list[HitBatch],
) -> None:
    for site, bs in _by_site(batches).items():
        assert [b.seq for b in bs] == list(range(len(bs))), site
        ends = np.array([b.live_end for b in bs])
        starts = np.array([b.live_start for b in bs])
        assert (starts[1:] >= ends[:-1]).all(), site
        assert (ends > starts).all(), site


def test_recv_order_nondecreasing_and_some_batches_overtaken(
    recording: tuple[Path, dict[str, Any]], batches: list[HitBatch]
) -> None:
    recv = np.array([b.recv_ns for b in batches], dtype=np.int64)
    assert (np.diff(recv) >= 0).all()
    live_end = np.array([b.live_end for b in batches], dtype=np.int64)
    # a batch written after another whose live interval ended later: out of live-time order
    overtaken = live_end[:-1] > np.minimum.accumulate(live_end[::-1])[::-1][1:]
    assert int(overtaken.sum()) > 10
    # late batches: arrival more than the lateness allowance after live start
    _, truth = recording
    late = recv - np.array([b.live_start for b in batches]) > truth["lateness_s"] * S
    assert int(late.sum()) == truth["late_batches"]
    n, p = len(batches), truth["late_fraction"]
    # binomial count, within 5 sigma (textbook)
    assert abs(late.sum() - n * p) < 5 * np.sqrt(n * p * (1 - p))
    on_time_delay = (recv - live_end)[~late] / S
    assert np.quantile(on_time_delay, 0.99) < 2.0  # "almost all well below 3 s"
    # one connection per site: its on-time batches arrive in seq order
    for site, bs in _by_site(batches).items():
        r = np.array([b.recv_ns for b in bs if b.recv_ns - b.live_start <= truth["lateness_s"] * S])
        assert (np.diff(r) >= 0).all(), site


# -- background -----------------------------------------------------------------


def _expected_counts(truth: dict[str, Any], batches: list[HitBatch]) -> dict[str, float]:
    """Expected background hits per site: the documented rate formula integrated over live
    time (Simpson's rule on each batch), written out here, not taken from the simulator."""
    sc = build_scenario(
        shipped_registry(), seed=truth["seed"], start_ns=START_NS, duration_ns=150 * S
    )
    params = {s.site_id: s for s in sc.sims}
    out: dict[str, float] = {}
    for site, bs in _by_site(batches).items():
        p = params[site]
        a = np.array([b.live_start for b in bs], dtype=np.int64)
        b_ = np.array([b.live_end for b in bs], dtype=np.int64)

        def rate(t: np.ndarray[Any, Any], p: Any = p) -> Any:
            ts = t / 1e9
            f = 1.0 + sum(
                amp * np.sin(2 * np.pi * ts / per + ph)
                for amp, per, ph in zip(
                    p.drift_amp, p.drift_period_s, p.drift_phase_rad, strict=True
                )
            )
            return p.rate_hz * (f + p.trend_per_h * (t - START_NS) / 3.6e12)

        mid = a + (b_ - a) / 2
        integral = (b_ - a) / 1e9 * (rate(a) + 4 * rate(mid) + rate(b_)) / 6
        out[site] = float(integral.sum())
    return out


def test_background_rate_over_live_time_matches_configured(
    recording: tuple[Path, dict[str, Any]], batches: list[HitBatch]
) -> None:
    _, truth = recording
    expected = _expected_counts(truth, batches)
    injected: dict[str, int] = defaultdict(int)
    for inj in truth["injections"]:
        for h in inj["hits"]:
            injected[h["site"]] += h.get("count", 1)
    checked = 0
    for site, bs in _by_site(batches).items():
        n = sum(b.n_hits for b in bs) - injected[site]
        mu = expected[site]
        # Poisson count: standard deviation sqrt(mu) (textbook); 4 sigma
        assert abs(n - mu) < 4 * np.sqrt(mu) + 1e-9, (site, n, mu)
        checked += mu > 100
    assert checked >= 16  # every GPS station holds > 100 expected hits in 150 s


def test_rate_from_area_for_sites_outside_the_scenario(tmp_path: Path) -> None:
    reg = SiteRegistry(
        [
            Site(
                id="fallow-yard-9",
                lat_deg=51.0,
                lon_deg=0.1,
                height_m=20.0,
                clock_sigma_ns=40.0,
                area_m2=0.02,
                kind="scintillator",
            )
        ]
    )
    sc = build_scenario(reg, seed=3, start_ns=START_NS, duration_ns=600 * S)
    sc = dataclasses.replace(
        sc, sims=(dataclasses.replace(sc.sims[0], drift_amp=(0.0, 0.0), trend_per_h=0.0),)
    )
    sim = simulate(sc)
    st = sim.streams[0]
    live_s = float((st.live_end - st.live_start).sum()) / 1e9
    # ~1 muon per cm^2 per minute at sea level: PDG, Review of Particle Physics,
    # "Cosmic rays" (from memory) -> 200 cm^2 count 200/60 Hz
    mu = 200.0 / 60.0 * live_s
    assert abs(st.t.size - mu) < 4 * np.sqrt(mu)  # Poisson, 4 sigma


def test_dead_time_shows_as_gaps_between_live_intervals(tmp_path: Path) -> None:
    reg = shipped_registry().subset(["kestrel-ridge", "orchard-5"])
    sc = build_scenario(reg, seed=2, start_ns=START_NS, duration_ns=300 * S)
    busy = tuple(
        dataclasses.replace(
            s, outages_per_day=1500.0, outage_median_s=4.0, outage_min_s=1.0, outage_max_s=20.0
        )
        for s in sc.sims
    )
    sim = simulate(dataclasses.replace(sc, sims=busy))
    out = tmp_path / "dead.jsonl"
    write_recording(sim, out)
    truth = json.loads(write_truth(sim, out).read_text())
    for site, bs in _by_site(_read(out, reg)).items():
        dead = [tuple(x) for x in truth["dead_time"][site]]
        assert len(dead) >= 3, site  # 1500/day over 300 s: ~5 expected
        gaps = [
            (x.live_end, y.live_start)
            for x, y in itertools.pairwise(bs)
            if y.live_start > x.live_end
        ]
        if bs[0].live_start > START_NS:
            gaps.insert(0, (START_NS, bs[0].live_start))
        if bs[-1].live_end < START_NS + 300 * S:
            gaps.append((bs[-1].live_end, START_NS + 300 * S))
        assert gaps == dead, site
        live = sum(b.live_end - b.live_start for b in bs)
        assert live + sum(b - a for a, b in dead) == 300 * S


# -- injections -----------------------------------------------------------------


def test_front_hits_follow_one_plane_front(
    recording: tuple[Path, dict[str, Any]], batches: list[HitBatch]
) -> None:
    _, truth = recording
    (front,) = [i for i in truth["injections"] if i["kind"] == "front"]
    assert front["spec"] == FRONT and len(front["sites"]) == 6
    spec = parse_injection(FRONT)
    assert isinstance(spec, FrontSpec)
    t0 = front["t0_gps_ns"]
    assert t0 == START_NS + 75 * S
    obstime = Time(t0 // S, (t0 % S) / 1e9, format="gps")
    # direction towards the source in Earth-fixed axes: astropy ICRS -> ITRS
    itrs = SkyCoord(ra=spec.ra_deg * u.deg, dec=spec.dec_deg * u.deg).transform_to(
        ITRS(obstime=obstime)
    )
    n = np.array(itrs.cartesian.xyz.value, dtype=float)
    n /= np.linalg.norm(n)
    sites = {s.id: s for s in SHIPPED_SITES}
    recorded = {(b.site, int(t)) for b in batches for t in b.t}
    t, r, sig = [], [], []
    for h in front["hits"]:
        s = sites[h["site"]]
        assert s.clock_sigma_ns <= 1e4  # GPS-timed
        assert (h["site"], h["t_ns"]) in recorded
        loc = EarthLocation.from_geodetic(s.lon_deg * u.deg, s.lat_deg * u.deg, s.height_m * u.m)
        alt = (
            SkyCoord(ra=spec.ra_deg * u.deg, dec=spec.dec_deg * u.deg)
            .transform_to(AltAz(obstime=obstime, location=loc))
            .alt.deg
        )
        assert alt > 10.0, (h["site"], alt)  # source above the site's horizon
        t.append(h["t_ns"])
        r.append([loc.x.to_value(u.m), loc.y.to_value(u.m), loc.z.to_value(u.m)])
        sig.append(s.clock_sigma_ns)
    ti = np.array(t, dtype=np.int64)
    ri, si = np.array(r), np.array(sig)
    # plane front t_i = t0 - n.r_i / c (standard timing triangulation); pairs within 5 sigma
    # of the two clock errors (+1 ns of rounding)
    for i in range(6):
        for j in range(i + 1, 6):
            dt = float(ti[i] - ti[j])
            pred = -float(n @ (ri[i] - ri[j])) / C_M_PER_S * 1e9
            assert abs(dt - pred) < 5 * np.hypot(si[i], si[j]) + 1.0, (i, j, dt, pred)
    # and each against the front's time at the Earth's centre
    resid = (ti - t0).astype(float) + (ri @ n) / C_M_PER_S * 1e9
    assert (np.abs(resid) < 5 * si + 1.0).all()
    # geometry spans tens of ms, so the check above is not trivially met by equal times
    assert np.ptp(ti) > 1e6


def test_front_with_named_sites_and_refusals() -> None:
    reg = shipped_registry()
    sc = build_scenario(reg, seed=4, start_ns=START_NS, duration_ns=120 * S)
    names = "hollow-creek-2+kestrel-ridge+dune-station"
    sim = simulate(sc, [parse_injection(f"front:at=60,ra=150,dec=35,names={names}")])
    assert sim.injections[0]["sites"] == sorted(names.split("+"), key=reg.index)
    # a source below the named site's horizon is refused, naming the site
    with pytest.raises(ValueError, match="ironbark-flat"):
        simulate(sc, [parse_injection("front:at=60,ra=150,dec=35,names=ironbark-flat")])
    with pytest.raises(ValueError, match="past the end"):
        simulate(sc, [parse_injection("front:at=500,ra=150,dec=35")])


def test_burst_raises_counts_by_the_expected_amount(
    recording: tuple[Path, dict[str, Any]], batches: list[HitBatch]
) -> None:
    _, truth = recording
    (burst,) = [i for i in truth["injections"] if i["kind"] == "burst"]
    spec = parse_injection(BURST)
    assert isinstance(spec, BurstSpec)
    ta, tb = START_NS + 20 * S, START_NS + 60 * S
    assert (burst["t0_gps_ns"], burst["t1_gps_ns"]) == (ta, tb)
    # default pick: the highest-rate sites that are live
    live_sites = {b.site for b in batches if b.live_start < tb and b.live_end > ta}
    top = sorted(live_sites, key=lambda s: -SHIPPED_RATES_HZ[s])[:6]
    assert sorted(burst["sites"]) == sorted(top)
    in_window: dict[str, int] = defaultdict(int)
    live_ns: dict[str, int] = defaultdict(int)
    for b in batches:
        in_window[b.site] += int(((b.t >= ta) & (b.t < tb)).sum())
        live_ns[b.site] += max(0, min(b.live_end, tb) - max(b.live_start, ta))
    n_boosted = 0
    for site in live_sites:
        # base rate over the window; the drift (<= 4.5 % from the base) is allowed for below
        mu0 = SHIPPED_RATES_HZ[site] * live_ns[site] / 1e9
        factor = 1.0 + spec.boost if site in burst["sites"] else 1.0
        mu = factor * mu0
        # Poisson, 5 sigma (textbook), plus the largest possible drift of the rate
        tol = 5 * np.sqrt(mu) + 0.045 * mu
        assert abs(in_window[site] - mu) < tol, (site, in_window[site], mu)
        n_boosted += site in burst["sites"]
    assert n_boosted == 6
    # the recorded extra counts match boost x rate x live time too (Poisson, 5 sigma)
    for h in burst["hits"]:
        mu = spec.boost * SHIPPED_RATES_HZ[h["site"]] * h["live_s"]
        assert abs(h["count"] - mu) < 5 * np.sqrt(mu) + 0.045 * mu


def test_injection_does_not_change_the_background() -> None:
    reg = shipped_registry().subset(["saltmarsh-obs", "dune-station", "fjord-end"])
    sc = build_scenario(reg, seed=9, start_ns=START_NS, duration_ns=60 * S)
    plain = simulate(sc)
    burst = simulate(sc, [parse_injection("burst:at=10,dur=20,boost=2,sites=1")])
    (site,) = burst.injections[0]["sites"]
    k = reg.index(site)
    assert site == "saltmarsh-obs"  # highest rate
    extra = np.setdiff1d(burst.streams[k].t, plain.streams[k].t)
    assert extra.size == burst.injections[0]["hits"][0]["count"] > 0
    assert np.isin(plain.streams[k].t, burst.streams[k].t).all()
    for a, b in zip(plain.recv_ns, burst.recv_ns, strict=True):
        assert (a == b).all()


# -- the injection language and the command line -----------------------------------


@pytest.mark.parametrize(
    ("text", "named"),
    [
        ("front:ra=1,dec=2", "'at=SECONDS' is required"),
        ("front:at=1,ra=400,dec=2", "ra='400'"),
        ("front:at=1,ra=10,dec=2,colour=red", "'colour'"),
        ("burst:at=x", "at='x'"),
        ("burst:at=5,sites=0", "sites='0'"),
        ("burst:at=5,pick=best", "pick='best'"),
        ("wave:at=5", "'wave'"),
        ("front:at=1,ra=1,dec=2,sites=2,names=a+b+c", "3 names"),
    ],
)
def test_bad_injection_specs_name_the_value(text: str, named: str) -> None:
    with pytest.raises(ValueError, match=re.escape(named)):
        parse_injection(text)


def test_injection_defaults() -> None:
    f = parse_injection("front:at=600,ra=120,dec=35")
    assert isinstance(f, FrontSpec) and (f.n_sites, f.min_elev_deg) == (6, 10.0)
    b = parse_injection("burst:at=1200,sites=20,boost=0.5,dur=30")
    assert isinstance(b, BurstSpec) and (b.n_sites, b.boost, b.dur_s, b.pick) == (
        20,
        0.5,
        30.0,
        "rate",
    )


@pytest.mark.parametrize(
    ("option", "value"),
    [
        ("--hours", "abc"),
        ("--hours", "-1"),
        ("--seed", "-3"),
        ("--late-fraction", "0.9"),
        ("--start", "yesterday"),
        ("--out", "rec.csv"),
        ("--inject", "front:at=1"),
    ],
)
def test_cli_bad_values_exit_2_naming_them(
    option: str,
    value: str,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    args = {
        "--sites": str(REPO / "replay_data" / "network.toml"),
        "--hours": "0.01",
        "--out": str(tmp_path / "r.jsonl"),
    }
    args[option] = value
    argv = ["simulate", *[x for kv in args.items() for x in kv], "--quiet"]
    assert _run_cli(argv, monkeypatch) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and value in err
    assert not (tmp_path / "r.jsonl").exists()


def test_cli_help_describes_every_option(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exc:
        parser = cli_main._Parser(prog="tocsin")
        sim_cli.add_parser(parser.add_subparsers(dest="command"))
        parser.parse_args(["simulate", "--help"])
    assert exc.value.code == 0
    text = capsys.readouterr().out
    for opt in (
        "--sites",
        "--hours",
        "--out",
        "--seed",
        "--inject",
        "--start",
        "--late-fraction",
        "front:at=SEC,ra=DEG,dec=DEG",
        "burst:at=SEC",
    ):
        assert opt in text


# -- the shipped scenario and demo -------------------------------------------------


def test_shipped_registry_file_is_the_scenario() -> None:
    reg = SiteRegistry.from_toml(REPO / "replay_data" / "network.toml")
    assert reg.sites == SHIPPED_SITES and len(reg) == 40
    gps = [s for s in reg if s.clock_sigma_ns <= 1e4]
    ntp = [s for s in reg if s.kind == "counter"]
    cam = [s for s in reg if s.kind == "camera-sensor"]
    assert len(gps) == 16 and all(20 <= s.clock_sigma_ns <= 100 for s in gps)
    assert all(5 <= SHIPPED_RATES_HZ[s.id] <= 40 and 0.1 <= (s.area_m2 or 0) <= 1 for s in gps)
    assert len(ntp) == 16 and all(1e6 <= s.clock_sigma_ns <= 1e7 for s in ntp)
    assert all(0.5 <= SHIPPED_RATES_HZ[s.id] <= 3 for s in ntp)
    assert len(cam) == 8 and all(5e7 <= s.clock_sigma_ns <= 3e8 for s in cam)
    assert all(2 <= SHIPPED_RATES_HZ[s.id] * 3600 <= 6 for s in cam)
    # a regional cluster: 8 GPS stations in central Europe, all within 2000 km of each other
    cluster = [s.id for s in gps if 40 < s.lat_deg < 60 and -10 < s.lon_deg < 25]
    assert len(cluster) >= 8
    xyz = reg.subset(cluster).ecef_m
    assert np.linalg.norm(xyz[:, None] - xyz[None], axis=-1).max() < 2e6


def test_many_directions_are_seen_by_six_gps_stations() -> None:
    gps = [s for s in SHIPPED_SITES if s.clock_sigma_ns <= 1e4]
    lat = np.radians([s.lat_deg for s in gps])
    lon = np.radians([s.lon_deg for s in gps])
    # local geodetic zenith (ellipsoid normal) in Earth-fixed axes, textbook geodesy
    up = np.stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)], axis=1)
    rng = np.random.default_rng(0)
    d = rng.normal(size=(4000, 3))
    d /= np.linalg.norm(d, axis=1, keepdims=True)  # isotropic directions (Earth-fixed)
    seen = ((d @ up.T) > np.sin(np.radians(10.0))).sum(axis=1)
    # design target of the scenario (this project's choice): a 6-station front is possible
    # from a good part of the sky, not only from above one cluster
    assert (seen >= 6).mean() > 0.3


def _same_but_float_bits(a: Any, b: Any, where: str = "truth") -> None:
    """Equal JSON values, floats to 1e-12 relative (1e-9 absolute), the rest exactly."""
    if isinstance(a, float) or isinstance(b, float):
        assert isinstance(a, float | int) and isinstance(b, float | int), where
        assert a == pytest.approx(b, rel=1e-12, abs=1e-9), where
    elif isinstance(a, dict):
        assert isinstance(b, dict) and a.keys() == b.keys(), where
        for k in a:
            _same_but_float_bits(a[k], b[k], f"{where}.{k}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _same_but_float_bits(x, y, f"{where}[{i}]")
    else:
        assert a == b, where


def test_shipped_demo_is_reproduced_by_its_documented_command(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    readme = (REPO / "replay_data" / "README.md").read_text()
    (cmd,) = [ln.strip() for ln in readme.splitlines() if ln.strip().startswith("tocsin simulate")]
    argv = shlex.split(cmd)[1:]
    k = argv.index("--out")
    assert argv[k + 1] == "replay_data/demo.jsonl.gz"
    argv[k + 1] = str(tmp_path / "demo.jsonl.gz")
    argv[argv.index("--sites") + 1] = str(REPO / "replay_data" / "network.toml")
    assert _run_cli([*argv, "--quiet"], monkeypatch) == 0
    shipped = REPO / "replay_data" / "demo.jsonl.gz"
    assert (tmp_path / "demo.jsonl.gz").read_bytes() == shipped.read_bytes()
    # The truth's derived floats (front direction in Earth-fixed axes, elevations,
    # delays) go through astropy's Earth orientation, whose bundled IERS table is
    # updated with astropy-iers-data: they may move in the last bits, nothing more.
    made = json.loads((tmp_path / "demo.truth.json").read_text())
    truth = json.loads(truth_path_for(shipped).read_text())
    _same_but_float_bits(made, truth)
    (front,) = truth["injections"]
    assert front["kind"] == "front" and len(front["sites"]) == 6
    assert 150 <= front["params"]["at_s"] <= 210 and truth["duration_s"] == 360
    assert not any(h["late"] for h in front["hits"])
