"""The compiled slot count (engine/slot_counts.py) against a direct count.

Reference: for every seed, every hit of the stream is tested against the slot of
its (seed site, site) pair by plain numpy comparisons, and the distinct sites of
the hits that are the earliest of their site in the slot are counted with a set.
Random streams with many repeated hits per site, sites that do not count (far
negative upper edges) and seeds that are also stream hits.
"""

from __future__ import annotations

import numpy as np
import pytest

from tocsin.engine.coincidence import NO_PREVIOUS_NS, previous_same_site
from tocsin.engine.slot_counts import slot_counts, slot_tables


def direct_counts(
    t: np.ndarray,
    site: np.ndarray,
    t_seed: np.ndarray,
    seed_site: np.ndarray,
    lo: np.ndarray,
    hi: np.ndarray,
) -> list[int]:
    out = []
    for ts, s in zip(t_seed.tolist(), seed_site.tolist(), strict=True):
        d = t - ts
        in_slot = (d >= lo[s, site]) & (d <= hi[s, site])
        seen: set[int] = set()
        for j in np.flatnonzero(in_slot):
            # earliest of its site in the slot: no hit of that site in the slot before it
            earlier = in_slot[:j] & (site[:j] == site[j])
            if not earlier.any():
                seen.add(int(site[j]))
        out.append(len(seen))
    return out


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("edges", ["spread", "even"])
def test_slot_counts_equal_a_direct_count(seed: int, edges: str) -> None:
    """``spread``: upper edges anywhere in 0-40 us (most hits need their pair's
    edges); ``even``: all within 30-31 us and one seed site counting nothing (most
    hits are decided by the seed site's row bounds alone)."""
    rng = np.random.default_rng(seed)
    n_sites, n_hits = 9, 3000
    t = np.sort(rng.integers(0, 10_000_000, n_hits)).astype(np.int64)
    site = rng.integers(0, n_sites, n_hits).astype(np.int64)
    lo = -rng.integers(0, 500, (n_sites, n_sites)).astype(np.int64)
    hi = rng.integers(0, 40_000, (n_sites, n_sites)).astype(np.int64)
    np.fill_diagonal(hi, NO_PREVIOUS_NS)  # a seed's own site never counts
    hi[:, 4] = NO_PREVIOUS_NS  # nor does site 4 for anyone
    if edges == "even":
        hi = np.where(hi > NO_PREVIOUS_NS, 30_000 + hi % 1000, hi)
        hi[2, :] = NO_PREVIOUS_NS  # seeds of site 2 count nothing
    seeds = np.sort(rng.choice(n_hits, 600, replace=False))
    t_seed, seed_site = t[seeds], site[seeds]
    prev = previous_same_site(t, site.astype(np.int32))
    tab = slot_tables(lo.ravel(), hi.ravel(), n_sites)

    def counts(need: np.ndarray) -> np.ndarray:
        out: np.ndarray = slot_counts(
            t,
            site,
            prev,
            t_seed,
            seed_site,
            tab.edges,
            tab.counted,
            tab.rows,
            n_sites,
            int(-lo.min()),
            int(hi.max()),
            need,
        )
        return out

    got = counts(np.zeros(n_sites, dtype=np.int64))
    want = direct_counts(t, site, t_seed, seed_site, lo, hi)
    assert got.tolist() == want
    assert max(want) >= 4 and min(want) == 0  # the data exercise both ends

    # With a count of interest per seed site, a seed is either counted exactly or
    # marked -1, and -1 only where its count really is below what was asked.
    need = rng.integers(0, 25, n_sites).astype(np.int64)
    need[0] = 0
    some = counts(need)
    skipped = some == -1
    assert (some[~skipped] == np.asarray(want)[~skipped]).all()
    assert (np.asarray(want)[skipped] < need[seed_site[skipped]]).all()
    assert skipped.any() and (~skipped).any()


def test_a_seed_whose_every_span_hit_counts_is_not_skipped() -> None:
    """The skip's bound is tight: when every hit of a seed's search span is in its
    slot at a distinct site, the seed is counted for ``need`` up to that number of
    hits and skipped only above it."""
    n_sites = 6
    t = np.array([100, 200, 300, 400, 500], dtype=np.int64)
    site = np.arange(1, 6, dtype=np.int64)
    prev = np.full(t.size, NO_PREVIOUS_NS, dtype=np.int64)
    lo = np.zeros((n_sites, n_sites), dtype=np.int64)
    hi = np.full((n_sites, n_sites), 1000, dtype=np.int64)
    np.fill_diagonal(hi, NO_PREVIOUS_NS)
    tab = slot_tables(lo.ravel(), hi.ravel(), n_sites)
    seed_t = np.array([50], dtype=np.int64)
    seed_s = np.array([0], dtype=np.int64)

    def count(k: int) -> int:
        need = np.full(n_sites, k, dtype=np.int64)
        out = slot_counts(
            t, site, prev, seed_t, seed_s, tab.edges, tab.counted, tab.rows, n_sites, 0, 1000, need
        )
        return int(out[0])

    assert count(0) == 5
    assert count(5) == 5
    assert count(6) == -1


@pytest.mark.parametrize("seed", [4, 5])
def test_previous_hit_in_one_pass_equals_the_sorted_way(seed: int) -> None:
    """The compiled pass for hits in time order gives what sorting by (site, time)
    gives: ties of one site at equal times, sites with one hit, and a ``before``
    array for the first hit of each site; ``before`` itself is left as it was."""
    rng = np.random.default_rng(seed)
    n_sites = 7
    t = np.sort(rng.integers(0, 200, 500)).astype(np.int64)  # many equal times
    site = rng.integers(0, n_sites - 1, 500).astype(np.int32)  # the last site: no hit
    before = rng.integers(-5_000, 0, n_sites).astype(np.int64)
    kept = before.copy()

    def sorted_way(tt: np.ndarray, ss: np.ndarray, b: np.ndarray | None) -> np.ndarray:
        order = np.lexsort((tt, ss))
        out = np.empty(tt.size, dtype=np.int64)
        for k, i in enumerate(order):
            same = k > 0 and ss[order[k - 1]] == ss[i]
            first = NO_PREVIOUS_NS if b is None else b[ss[i]]
            out[i] = tt[order[k - 1]] if same else first
        return out

    got = previous_same_site(t, site, before=before)
    assert got.tolist() == sorted_way(t, site, before).tolist()
    assert previous_same_site(t, site).tolist() == sorted_way(t, site, None).tolist()
    assert (before == kept).all()
    pairs = np.unique(t.astype(np.int64) * n_sites + site)
    assert pairs.size < t.size  # some site has two hits at one time
    shuffled = rng.permutation(t.size)  # out of time order: the sorting path
    ts, ss = t[shuffled], site[shuffled]
    assert previous_same_site(ts, ss).tolist() == sorted_way(ts, ss, None).tolist()


def numpy_slot_tables(
    lo: np.ndarray, hi: np.ndarray, occ: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The tables built with numpy, rule by rule: a pair counts when its occupancy is
    above 0 and its upper edge is not below its lower edge (else its upper edge is
    -2**62); per seed site the highest lower edge, lowest upper edge and lowest lower
    edge of its counted pairs, or (max, min, min) when it has none."""
    hi_c = np.where(occ > 0, hi, -(2**62)).astype(np.int64)
    lo = lo.astype(np.int64)
    counted = hi_c >= lo
    big, small = np.iinfo(np.int64).max, np.iinfo(np.int64).min
    rows = np.stack(
        [
            np.where(counted, lo, small).max(axis=1, initial=small),
            np.where(counted, hi_c, big).min(axis=1, initial=big),
            np.where(counted, lo, big).min(axis=1, initial=big),
        ],
        axis=1,
    )
    rows[~counted.any(axis=1)] = (big, small, small)
    edges = np.stack([lo.ravel(), hi_c.ravel()], axis=1)
    return edges, counted.ravel(), counted.any(axis=0), rows


@pytest.mark.parametrize("hi_dtype", [np.int64, np.float64])
def test_compiled_tables_equal_the_numpy_rules(hi_dtype: type) -> None:
    rng = np.random.default_rng(11)
    n = 40
    lo = -rng.integers(0, 500, (n, n)).astype(np.int64)
    hi = rng.integers(-600, 40_000, (n, n)).astype(hi_dtype)  # some below lo
    occ = np.where(rng.random((n, n)) < 0.2, 0.0, rng.random((n, n)))
    occ[3, :] = 0.0  # seed site 3 counts nobody
    occ[:, 7] = 0.0  # site 7 counts for nobody
    np.fill_diagonal(occ, 0.0)
    tab = slot_tables(lo.ravel(), hi.ravel(), n, occupancy=occ.ravel())
    edges, counted, as_nb, rows = numpy_slot_tables(lo, hi, occ)
    np.testing.assert_array_equal(tab.edges, edges)
    np.testing.assert_array_equal(tab.counted, counted)
    np.testing.assert_array_equal(tab.as_neighbour, as_nb)
    np.testing.assert_array_equal(tab.rows, rows)
    assert not tab.as_neighbour[7] and tuple(tab.rows[3]) == (2**63 - 1, -(2**63), -(2**63))
    # without occupancies every pair with hi >= lo counts
    plain = slot_tables(lo.ravel(), hi.ravel(), n)
    np.testing.assert_array_equal(plain.counted, (hi >= lo).ravel())
