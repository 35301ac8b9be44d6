"""The shipped recording replayed through one :class:`~tocsin.pipeline.Pipeline`, batch
by batch, as several tests compare engines on it."""

from __future__ import annotations

from pathlib import Path

from tocsin.io.recording import read_recording
from tocsin.model.candidate import Candidate
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.pipeline import Pipeline

DATA = Path(__file__).resolve().parents[1] / "replay_data"


def replay_shipped(
    cfg: EngineConfig, *, candidate_far_per_year: float = 1e7, threads: int = 1
) -> list[Candidate]:
    """Every candidate of the shipped recording (``replay_data/demo.jsonl.gz``, 40
    sites, six minutes, one injected front) in 16 s blocks, in the order given."""
    registry = SiteRegistry.from_toml(DATA / "network.toml")
    pipe = Pipeline(
        registry,
        cfg,
        candidate_far_per_year=candidate_far_per_year,
        release_every_s=16.0,
        threads=threads,
    )
    out: list[Candidate] = []
    for item in read_recording(DATA / "demo.jsonl.gz", registry):
        out += pipe.offer(item)
    return out + pipe.finish()
