"""The engine's candidates do not depend on how many threads evaluate the seeds.

Seeds are judged independently, so splitting a stretch of seeds over threads and
merging the parts must give exactly what one call gives. Checked on the shipped
recording (six minutes, 40 sites, one injected front) with a loose candidate
threshold (hundreds of candidates of every statistic) and the split made small
enough that every 16 s block is cut into parts.
"""

from __future__ import annotations

from collections.abc import Callable

import pytest

from tests.shipped import DATA, replay_shipped
from tocsin.engine import core, front
from tocsin.engine.coincidence import SeedResult
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry


def _lines(threads: int) -> list[bytes]:
    return [c.to_json_line() for c in replay_shipped(EngineConfig(), threads=threads)]


def test_threads_give_byte_identical_candidates(monkeypatch: pytest.MonkeyPatch) -> None:
    calls: list[int] = []
    real = core.Engine._in_chunks

    def counting(
        self: core.Engine, evaluate: Callable[[int, int], list[SeedResult]], i0: int, i1: int
    ) -> list[SeedResult]:
        n = min(self.threads, (i1 - i0) // core.PARALLEL_MIN_SEEDS)
        calls.append(n)
        return real(self, evaluate, i0, i1)

    monkeypatch.setattr(core, "PARALLEL_MIN_SEEDS", 200)
    monkeypatch.setattr(core.Engine, "_in_chunks", counting)
    one = _lines(1)
    assert len(one) > 100
    assert any(b'"statistic":"front"' in x for x in one)
    assert max(calls) <= 1
    for threads in (2, 3):
        calls.clear()
        assert _lines(threads) == one, threads
        assert max(calls) == threads  # the stretches really were split


def test_threads_must_be_positive() -> None:
    registry = SiteRegistry.from_toml(DATA / "network.toml")
    with pytest.raises(ValueError, match="threads 0"):
        core.Engine(registry, EngineConfig(), threads=0)


def test_front_passes_give_byte_identical_candidates(monkeypatch: pytest.MonkeyPatch) -> None:
    """The front search holds a bounded number of seeds and triple rows at once (memory
    on dense networks); slicing the seeds must not change a single candidate."""
    one = _lines(1)
    evaluated: list[int] = []
    real = front.FrontSearch._evaluate_seeds

    def counting(self: front.FrontSearch, cand: object, *args: object) -> list[SeedResult]:
        evaluated.append(len(cand))  # type: ignore[arg-type]
        return real(self, cand, *args)  # type: ignore[arg-type]

    monkeypatch.setattr(front, "SEEDS_PER_PASS", 500)
    monkeypatch.setattr(front, "ROWS_PER_PASS", 64)
    monkeypatch.setattr(front.FrontSearch, "_evaluate_seeds", counting)
    assert _lines(1) == one
    assert len(evaluated) > 100 and max(evaluated) <= 64  # the slicing really happened
