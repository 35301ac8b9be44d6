"""The follow-up ring buffer: bounded by hours, numpy storage, fed by the pipeline."""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from tocsin.engine.block import Block
from tocsin.io.hitring import HitRing
from tocsin.io.recording import read_recording
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.pipeline import Pipeline
from tocsin.types import NS_PER_S

T0 = 1_457_481_618 * NS_PER_S


def _blocks(n_sites: int, n: int, seed: int = 0) -> list[Block]:
    rng = np.random.default_rng(seed)
    out = []
    for k in range(n):
        a, b = T0 + k * 60 * NS_PER_S, T0 + (k + 1) * 60 * NS_PER_S
        m = int(rng.integers(0, 50))
        t = np.sort(rng.integers(a, b, m)).astype(np.int64)
        s = rng.integers(0, n_sites, m).astype(np.int32)
        out.append(
            Block(
                a,
                b,
                t,
                s,
                np.arange(n_sites, dtype=np.int32),
                np.full(n_sites, a),
                np.full(n_sites, b - 1000),
            )
        )
    return out


def test_ring_keeps_the_last_hours_and_slices_exactly() -> None:
    blocks = _blocks(4, 300)  # 5 h of 1-minute blocks
    ring = HitRing(4, hours=2.0)
    for b in blocks:
        ring.add(b)
    assert ring.t_end == blocks[-1].t_end
    assert (
        ring.t_start is not None
        and ring.t_end - ring.t_start <= (2 * 3600 + 2 * 3600 // 16 + 60) * NS_PER_S
    )
    assert ring.t_end - ring.t_start >= 2 * 3600 * NS_PER_S
    lo, hi = T0 + 4 * 3600 * NS_PER_S + 17, T0 + 4 * 3600 * NS_PER_S + 1234 * NS_PER_S
    got = ring.block(lo, hi)
    all_t = np.concatenate([b.t for b in blocks])
    all_s = np.concatenate([b.site for b in blocks])
    m = (all_t >= lo) & (all_t < hi)
    assert np.array_equal(got.t, all_t[m]) and np.array_equal(got.site, all_s[m])
    assert got.t_start == lo and got.t_end == hi
    # live intervals clipped to the slice: 4 sites x (60 s - 1 us) per minute
    live = int(np.sum(got.live_end - got.live_start))
    assert live == pytest.approx(4 * (hi - lo), rel=1e-3)
    # compact storage: 10 bytes a hit (int64 + int16) and 18 per live interval
    n_live = sum(b.live_site.size for b in blocks if b.t_end > ring.t_start)
    assert ring.nbytes() <= 10 * ring.n_hits + 18 * n_live
    with pytest.raises(ValueError, match="before the ring's end"):
        ring.add(blocks[0])


def test_pipeline_feeds_the_ring_and_checkpoints_without_it(
    small_registry: SiteRegistry, tmp_path: object
) -> None:
    from pathlib import Path

    from tocsin.cli.main import main

    out = Path(str(tmp_path))
    reg_path = out / "sites.toml"
    reg_path.write_text(small_registry.to_toml())
    rec = out / "rec.jsonl"
    assert (
        main(
            [
                "simulate",
                "--sites",
                str(reg_path),
                "--hours",
                "0.05",
                "--out",
                str(rec),
                "--seed",
                "4",
            ]
        )
        == 0
    )
    pipe = Pipeline(small_registry, EngineConfig(), release_every_s=16.0)
    ring = HitRing(len(small_registry), hours=1.0)
    pipe.block_sink = ring.add
    accepted = 0
    for item in read_recording(rec, small_registry):
        pipe.offer(item)
    pipe.finish()
    accepted = pipe.counters.hits_accepted
    assert ring.n_hits == accepted > 0
    clone = pickle.loads(pickle.dumps(pipe))
    assert clone.block_sink is None  # the ring is not part of the checkpoint
    assert pipe.block_sink is not None
