"""The plane-front search can be switched off (``front_scales_s = []``): the engine
then runs the other statistics alone, and their false alarm rates carry no trials
for the front."""

from __future__ import annotations

import numpy as np

from tests.shipped import DATA, replay_shipped
from tocsin.engine.core import Engine
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry


def test_engine_without_the_front_search_runs_the_other_statistics() -> None:
    on = EngineConfig()
    off = on.model_copy(
        update={"coincidence": on.coincidence.model_copy(update={"front_scales_s": []})}
    )
    with_front = replay_shipped(on)
    without = replay_shipped(off)
    assert any(c.statistic == "front" for c in with_front)  # the search does run by default
    assert not any(c.statistic == "front" for c in without)

    # the excess trigger does not depend on the front search
    assert [c.to_json_line() for c in with_front if c.trigger == "excess"] == [
        c.to_json_line() for c in without if c.trigger == "excess"
    ]
    assert any(c.statistic == "sites" for c in without)


def test_without_the_front_search_seeds_carry_fewer_trials() -> None:
    """The FAR multiplier (evaluations per seed hit, coincidence.py) loses exactly the
    front's share and nothing else."""
    registry = SiteRegistry.from_toml(DATA / "network.toml")
    on = EngineConfig()
    off = on.model_copy(
        update={"coincidence": on.coincidence.model_copy(update={"front_scales_s": []})}
    )
    e_on, e_off = Engine(registry, on), Engine(registry, off)
    rng = np.random.default_rng(7)
    rates_hz = rng.uniform(0.5, 40.0, len(registry))
    ok = np.ones(len(registry), dtype=bool)
    front = e_on.front.seed_weight(rates_hz * 1e-9)
    assert front.max() > 0  # the front does add trials on this network
    assert not e_off.front.seed_weight(rates_hz * 1e-9).any()
    t_on = e_on.coinc.tables(rates_hz, ok, ok, extra_seed_weight=front)
    t_off = e_off.coinc.tables(rates_hz, ok, ok, extra_seed_weight=None)
    np.testing.assert_allclose(t_off.seed_weight, t_on.seed_weight - front, rtol=0, atol=1e-12)
    assert t_off.trial_rate_hz < t_on.trial_rate_hz
