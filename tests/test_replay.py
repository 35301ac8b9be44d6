"""`tocsin replay`: bad lines are reported and counted, good ones all used; results do
not depend on how the stream is cut into blocks; exit codes follow the contract."""

from __future__ import annotations

import gzip
import json
from pathlib import Path

import orjson
import pytest

from tests.netsim import run_pipeline
from tocsin.cli.main import main
from tocsin.io.recording import read_recording
from tocsin.model.registry import SiteRegistry

DATA = Path(__file__).resolve().parents[1] / "replay_data"
REC = DATA / "demo.jsonl.gz"
SITES = DATA / "network.toml"


@pytest.fixture(scope="module")
def registry() -> SiteRegistry:
    return SiteRegistry.from_toml(SITES)


def _lines() -> list[bytes]:
    with gzip.open(REC, "rb") as fh:
        return [ln.rstrip(b"\n") for ln in fh]


def test_bad_lines_are_rejected_counted_and_the_rest_used(tmp_path: Path) -> None:
    lines = _lines()
    good = orjson.loads(lines[100])
    bad = [
        b'{"v": 1, "site": "hollow-creek-2", "seq": ',  # bad JSON
        orjson.dumps({**good, "site": "no-such-site"}),  # unknown site
        orjson.dumps({**good, "seq": 10**9, "t": list(reversed(good["t"])) or [1, 0]}),
        orjson.dumps({**good, "seq": 10**9 + 1, "t": [good["live"][1] + 5]}),  # outside live
        orjson.dumps({**good, "seq": 10**9 + 2, "t": [-3]}),  # negative time
    ]
    if len(good["t"]) < 2:  # make the unsorted case truly unsorted
        bad[2] = orjson.dumps(
            {**good, "seq": 10**9, "t": [good["live"][0] + 9, good["live"][0] + 3]}
        )
    dup = lines[100]  # the same batch again: a repeated seq
    mixed = lines[:500] + bad + [dup] + lines[500:]
    rec = tmp_path / "mixed.jsonl"
    rec.write_bytes(b"\n".join(mixed) + b"\n")
    out_clean, out_mixed = tmp_path / "clean", tmp_path / "mixed"
    assert (
        main(["replay", str(REC), "--sites", str(SITES), "--out", str(out_clean), "--quiet"]) == 0
    )
    assert (
        main(["replay", str(rec), "--sites", str(SITES), "--out", str(out_mixed), "--quiet"]) == 0
    )
    s_clean = json.loads((out_clean / "summary.json").read_text())
    s_mixed = json.loads((out_mixed / "summary.json").read_text())
    rej = s_mixed["rejected"]
    for reason in ("bad_json", "unknown_site", "unsorted_hits", "hit_outside_live", "bad_schema"):
        assert rej.get(reason, 0) - s_clean["rejected"].get(reason, 0) == 1, (reason, rej)
    assert rej["duplicate_seq"] - s_clean["rejected"].get("duplicate_seq", 0) == 1
    # nothing good was lost: same accepted batches, hits and candidates as the clean file
    assert s_mixed["batches_accepted"] == s_clean["batches_accepted"]
    assert s_mixed["hits"] == s_clean["hits"]
    assert (out_mixed / "candidates.jsonl").read_bytes() == (
        out_clean / "candidates.jsonl"
    ).read_bytes()
    reported = [json.loads(x) for x in (out_mixed / "rejected.jsonl").read_text().splitlines()]
    assert {r["reason"] for r in reported} >= {"bad_json", "unknown_site", "unsorted_hits"}
    assert all(r["line"] > 0 and r["detail"] for r in reported)


def test_results_do_not_depend_on_block_length(registry: SiteRegistry) -> None:
    """Live hands the engine 1 s blocks, replay 16 s: the candidates must be identical."""
    items = list(read_recording(REC, registry))
    _, _, fine = run_pipeline(registry, items, candidate_far=1e6, release_every_s=1.0)
    _, _, coarse = run_pipeline(registry, items, candidate_far=1e6, release_every_s=16.0)
    assert len(fine) > 10
    assert [c.to_json_line() for c in fine] == [c.to_json_line() for c in coarse]


def test_demo_replay_finds_the_injected_front(tmp_path: Path) -> None:
    assert main(["replay", str(REC), "--sites", str(SITES), "--out", str(tmp_path), "--quiet"]) == 0
    cands = [json.loads(x) for x in (tmp_path / "candidates.jsonl").read_text().splitlines()]
    truth = json.loads((DATA / "demo.truth.json").read_text())
    front_sites = set(truth["injections"][0]["sites"])
    hits = [c for c in cands if set(c["sites"]) == front_sites]
    assert hits and all(c["trigger"] == "coincidence" for c in hits)
    for c in cands:  # every record carries the contract's fields
        for key in (
            "id",
            "trigger",
            "time_gps_ns",
            "time_utc",
            "window_s",
            "sites",
            "multiplicity",
            "p_value",
            "far_per_year",
            "significance_sigma",
        ):
            assert key in c


def test_a_journal_directory_replays_as_its_segments_in_a_row(tmp_path: Path) -> None:
    """The service's journal (segment files in arrival order) replays like the one
    recording they make up; a torn last line (the service died mid-write, the batch
    was never acknowledged) is left out, not reported as bad."""
    lines = _lines()
    cut = len(lines) // 3
    journal = tmp_path / "journal"
    journal.mkdir()
    first, second = lines[:cut], lines[cut:]
    (journal / f"journal-{1:020d}.jsonl").write_bytes(b"\n".join(first) + b"\n")
    (journal / f"journal-{2:020d}.jsonl").write_bytes(
        b"\n".join(second) + b"\n" + second[-1][:40]  # torn
    )
    (journal / "notes.txt").write_text("not a segment")
    runs = {}
    for name, src in (("file", REC), ("journal", journal)):
        out = tmp_path / name
        assert main(["replay", str(src), "--sites", str(SITES), "--out", str(out), "--quiet"]) == 0
        summary = json.loads((out / "summary.json").read_text())
        for k in ("wall_s", "hits_per_s"):
            summary.pop(k)
        runs[name] = ((out / "candidates.jsonl").read_bytes(), summary)
    assert runs["journal"] == runs["file"]
    assert runs["file"][0]  # the shipped front, so there is something to compare
    empty = tmp_path / "empty"
    empty.mkdir()
    assert main(["replay", str(empty), "--sites", str(SITES), "--out", str(tmp_path / "e")]) == 2


@pytest.mark.parametrize(
    ("argv", "needle"),
    [
        (["replay", "missing.jsonl", "--sites", str(SITES), "--out", "x"], "missing.jsonl"),
        (["replay", str(REC), "--sites", "nowhere.toml", "--out", "x"], "nowhere.toml"),
        (["replay", str(REC), "--sites", str(SITES), "--out", "x", "--candidate-far", "-3"], "-3"),
    ],
)
def test_bad_usage_exits_2_with_a_reason(
    argv: list[str], needle: str, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and needle in err[0]


def test_a_long_empty_stretch_is_skipped_not_misbinned(registry: SiteRegistry) -> None:
    """A block spanning months after the data (a restart long after, or a recording
    with a gap) leaves the engine consistent: old hits are not wrapped into new bins,
    and seeds whose background is gone are counted as skipped, not judged."""
    from tocsin.engine.block import Block

    pipe, _, _ = run_pipeline(registry, list(read_recording(REC, registry)), candidate_far=1e6)
    eng = pipe.engine
    assert eng.t_end is not None
    far = eng.t_end + 200 * 86400 * 10**9
    assert eng.process(Block.empty(eng.t_end, far)) == []
    assert eng.store.end_bin == far // eng.bin_ns
    assert eng.store.counts(eng.store.first_bin, eng.store.end_bin).sum() == 0
    assert eng.store.live_ns(eng.store.first_bin, eng.store.end_bin).sum() == 0
