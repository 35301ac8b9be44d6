"""A pickled engine (what a checkpoint holds) leaves out what it can rebuild, and
carries on exactly as one that was never pickled."""

from __future__ import annotations

import pickle
from pathlib import Path

from tocsin.engine.core import Engine
from tocsin.io.recording import read_recording
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.pipeline import Pipeline

DATA = Path(__file__).resolve().parents[1] / "replay_data"


def test_engine_restored_from_a_pickle_gives_the_same_candidates() -> None:
    registry = SiteRegistry.from_toml(DATA / "network.toml")
    items = list(read_recording(DATA / "demo.jsonl.gz", registry))

    def pipeline() -> Pipeline:
        return Pipeline(registry, EngineConfig(), candidate_far_per_year=1e7, release_every_s=16.0)

    whole = pipeline()
    want = [c.to_json_line() for x in items for c in whole.offer(x)]
    want += [c.to_json_line() for c in whole.finish()]

    first = pipeline()
    half = len(items) // 2
    got = [c.to_json_line() for x in items[:half] for c in first.offer(x)]
    assert first.engine._tables  # rate tables were built and cached before the pickle
    blob = pickle.dumps(first, protocol=5)
    restored: Pipeline = pickle.loads(blob)
    got += [c.to_json_line() for x in items[half:] for c in restored.offer(x)]
    got += [c.to_json_line() for c in restored.finish()]
    assert len(want) > 100  # every statistic, at a loose threshold
    assert got == want
    # the slot geometry and the cached tables are not in the pickle
    state = first.engine.__getstate__()
    assert not set(Engine._DERIVED) & set(state)
