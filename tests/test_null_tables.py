"""The coincidence null tables: a scale skipped on bounds gets the tables it would
have got from the exact N x N occupancies (``CoincidenceTrigger.skip_by_bounds``).

Reference: the same trigger with the shortcut switched off. Networks of invented
sites, with rates spread over six decades so that some seed sites sit near every
threshold the bounds decide (the redundancy ratio against the previous scale, the
largest expected neighbour count, the occupancy cap).
"""

from __future__ import annotations

import numpy as np
import pytest

from tocsin.engine.coincidence import CoincidenceTrigger, Tables
from tocsin.model.config import CoincidenceConfig
from tocsin.model.registry import Site, SiteRegistry


def _registry(n: int, rng: np.random.Generator) -> SiteRegistry:
    lat = rng.uniform(-40.0, 55.0, n)
    lon = rng.uniform(-120.0, 140.0, n)
    return SiteRegistry(
        [
            Site(
                id=f"tarn-{k:03d}",
                lat_deg=float(lat[k]),
                lon_deg=float(lon[k]),
                height_m=float(rng.uniform(0, 2000)),
                clock_sigma_ns=float(rng.choice([20.0, 300.0, 2e6])),
            )
            for k in range(n)
        ]
    )


def _same(a: Tables, b: Tables) -> None:
    assert np.array_equal(a.seed_weight, b.seed_weight)
    assert a.trial_rate_hz == b.trial_rate_hz
    for sa, sb in zip(a.scales, b.scales, strict=True):
        assert np.array_equal(sa.active, sb.active)
        assert np.array_equal(sa.tail_gt, sb.tail_gt)
        assert np.array_equal(sa.point, sb.point)
        assert (sa.slots is None) == (sb.slots is None)
        if sa.slots is not None and sb.slots is not None:
            assert np.array_equal(sa.slots.edges, sb.slots.edges)
            assert np.array_equal(sa.slots.counted, sb.slots.counted)
            assert np.array_equal(sa.slots.rows, sb.slots.rows)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_scales_skipped_on_bounds_get_the_exact_tables(
    seed: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    rng = np.random.default_rng(seed)
    reg = _registry(60, rng)
    trig = CoincidenceTrigger(reg, CoincidenceConfig())
    skipped: list[bool] = []
    inner = trig._surely_inactive

    def spy(*args: object) -> bool:
        out = inner(*args)  # type: ignore[arg-type]
        skipped.append(out)
        return out

    monkeypatch.setattr(trig, "_surely_inactive", spy)
    for trial in range(12):
        if trial % 3 == 0:  # a quiet network: one rate for all, near the thresholds
            rates = np.full(60, 10.0 ** rng.uniform(-1, 3))
        else:
            rates = 10.0 ** rng.uniform(-3, 3, 60)
        ok = rng.random(60) > 0.1
        live = ok & (rng.random(60) > 0.1)
        trig.skip_by_bounds = True
        fast = trig.tables(rates, live, ok)
        trig.skip_by_bounds = False
        exact = trig.tables(rates, live, ok)
        _same(fast, exact)
    assert any(skipped) and not all(skipped)  # both ways were taken


def test_scales_near_the_redundancy_ratio_are_decided_as_exactly() -> None:
    """A small array with scales about 2.5-4 times apart: each scale's expected
    neighbour count is close to the redundancy ratio (3) times the previous one's,
    where a loose bound would drop a scale that is fresh (or keep a stale one)."""
    rng = np.random.default_rng(7)
    n = 16
    sites = [
        Site(
            id=f"scree-{k:02d}",
            lat_deg=46.5 + float(rng.uniform(-0.0005, 0.0005)),
            lon_deg=8.0 + float(rng.uniform(-0.0005, 0.0005)),
            height_m=2500.0,
            clock_sigma_ns=20.0,
        )
        for k in range(n)
    ]
    cfg = CoincidenceConfig(scales_s=[1e-6, 2.6e-6, 9e-6, 3.3e-5, 1e-4, 4e-4])
    trig = CoincidenceTrigger(SiteRegistry(sites), cfg)
    n_skipped = 0
    for rate in (0.5, 5.0, 50.0, 500.0):
        rates = np.full(n, rate) * rng.uniform(0.97, 1.03, n)
        ok = np.ones(n, dtype=bool)
        trig.skip_by_bounds = True
        fast = trig.tables(rates, ok, ok)
        trig.skip_by_bounds = False
        exact = trig.tables(rates, ok, ok)
        _same(fast, exact)
        n_active = [bool(s.active.any()) for s in exact.scales]
        n_skipped += n_active.count(False)
        assert any(n_active[1:])  # some later scale is fresh: the ratio test matters
    assert n_skipped > 0


def test_slot_tables_kept_between_rate_epochs_equal_fresh_ones() -> None:
    """A trigger keeps each scale's slot tables while the pattern of counted pairs
    holds; rates that change the pattern (sites leaving, occupancy over the cap) must
    give the tables a trigger that never saw the earlier rates builds."""
    rng = np.random.default_rng(7)
    reg = _registry(60, rng)
    kept = CoincidenceTrigger(reg, CoincidenceConfig())
    reused = 0
    for kind in (0, 0, 1, 1, 0, 2, 2, 0, 1, 0):
        rates = np.full(60, 1.0) * rng.uniform(0.8, 1.2, 60)
        ok = np.ones(60, dtype=bool)
        if kind == 1:
            ok[rng.choice(60, 5, replace=False)] = False  # some sites leave
        if kind == 2:
            rates[rng.choice(60, 3, replace=False)] = 1e4  # busy: over the occupancy cap
        before = {k: v[1] for k, v in kept._slot_cache.items()}
        got = kept.tables(rates, ok, ok)
        _same(got, CoincidenceTrigger(reg, CoincidenceConfig()).tables(rates, ok, ok))
        reused += sum(
            s.slots is before.get(k) for k, s in enumerate(got.scales) if s.slots is not None
        )
    assert reused > 0  # the kept tables were used
