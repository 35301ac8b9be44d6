"""Alert policy and archive: thresholds, updates, retractions, the rate limit, restarts."""

from __future__ import annotations

import dataclasses
import sqlite3
from pathlib import Path

import pytest
from astropy.io import fits

from tests.alertkit import T0, config, excess_candidate, front_candidate
from tocsin.alerts.archive import Archive
from tocsin.alerts.outbox import flush_directory
from tocsin.alerts.packet import read_alert
from tocsin.alerts.policy import AlertDesk, AlertError
from tocsin.errors import ConfigError
from tocsin.model.alert_config import AlertConfig
from tocsin.model.candidate import Candidate
from tocsin.types import NS_PER_S


def _desk(
    tmp: Path, cfg: AlertConfig | None = None, subs: tuple[str, ...] = ("obs-a",)
) -> AlertDesk:
    cfg = cfg or config()
    arch = Archive(tmp / "alerts.sqlite", stream=cfg.stream_ivorn, role=cfg.role)
    return AlertDesk(cfg, arch, packet_dir=tmp / "packets", mqtt=True, subscribers=list(subs))


def test_thresholds_choose_level_and_sinks(tmp_path: Path) -> None:
    desk = _desk(tmp_path)
    assert desk.consider(excess_candidate(far=400.0)) is None  # above 1/day: no alert
    internal = desk.consider(excess_candidate(far=100.0, t_ns=T0 + 10 * NS_PER_S))
    public = desk.consider(front_candidate(far=0.5))
    assert internal is not None and internal.level == "internal"
    assert public is not None and public.level == "public"
    sinks = {d.sink for d in desk.archive.deliveries(internal.ivorn)}
    assert sinks == {"dir", "mqtt"}
    sinks = {d.sink for d in desk.archive.deliveries(public.ivorn)}
    assert sinks == {"dir", "mqtt", "vtp:obs-a"}
    assert public.skymap is not None and Path(public.skymap).is_file()
    with fits.open(public.skymap) as hdul:  # the map follows the error ellipse
        h = hdul[1].header
        got = [h["ERR_MAJ"], h["ERR_MIN"], h["ERR_PA"]]
    assert got == pytest.approx(front_candidate().details["err_ellipse_deg"], rel=1e-12)
    assert read_alert(public.xml).ivorn == public.ivorn
    assert flush_directory(desk.archive, tmp_path / "packets") == 2
    assert flush_directory(desk.archive, tmp_path / "packets") == 0
    assert (tmp_path / "packets" / f"{public.candidate_id}.xml").read_bytes() == public.xml


def test_update_cites_first_and_restart_never_renumbers(tmp_path: Path) -> None:
    desk = _desk(tmp_path)
    first = desk.consider(front_candidate(far=0.5))
    assert first is not None
    cid = first.candidate_id
    upd = desk.consider(front_candidate(far=0.01, revision=2, sites=7, cid=cid))
    assert upd is not None and upd.kind == "update"
    assert upd.ivorn == first.ivorn + "-u1"
    assert read_alert(upd.xml).citations == [(first.ivorn, "supersedes")]
    assert desk.consider(front_candidate(far=0.01, revision=2, sites=7, cid=cid)) is None
    desk.archive.close()
    again = _desk(tmp_path)  # restart: the same candidates come back from the journal
    assert again.consider(front_candidate(far=0.5)) is None
    assert again.consider(front_candidate(far=0.01, revision=2, sites=7, cid=cid)) is None
    rows = again.archive.latest()
    assert [r.ivorn for r in reversed(rows)] == [first.ivorn, upd.ivorn]
    assert [r.seq for r in reversed(rows)] == [first.seq, upd.seq]


def test_retraction(tmp_path: Path) -> None:
    desk = _desk(tmp_path)
    first = desk.consider(front_candidate(far=0.5))
    assert first is not None
    upd = desk.consider(front_candidate(far=0.01, revision=2, cid=first.candidate_id))
    assert upd is not None
    with pytest.raises(AlertError, match="needs --reason"):
        desk.retract(upd.ivorn, "  ")
    with pytest.raises(AlertError, match="no archived alert"):
        desk.retract(first.ivorn + "-nope", "x")
    r = desk.retract(upd.ivorn, "timing fault at two sites")
    assert r.ivorn == first.ivorn + "-x" and r.level == "public"
    assert upd.ivorn == first.ivorn + "-u1"
    assert read_alert(r.xml).citations == [(first.ivorn, "retraction")]
    assert {d.sink for d in desk.archive.deliveries(r.ivorn)} == {"dir", "mqtt", "vtp:obs-a"}
    with pytest.raises(AlertError, match="already retracted"):
        desk.retract(first.ivorn, "again")
    # later revisions of a retracted candidate stay quiet
    assert desk.consider(front_candidate(far=0.001, revision=3, cid=first.candidate_id)) is None


def _statuses_after_restart(
    tmp_path: Path, cfg: AlertConfig, cands: list[Candidate]
) -> list[str | None]:
    """A new desk on the same archive (a restart) considers ``cands``: their statuses
    (None where no alert was made)."""
    again = _desk(tmp_path, cfg)
    return [None if (r := again.consider(c)) is None else r.status for c in cands]


def test_rate_limit_holds_a_storm_and_refills_with_event_time(tmp_path: Path) -> None:
    desk = _desk(tmp_path, config(burst=3, max_per_hour=6.0))
    rows = [desk.consider(excess_candidate(far=100.0, t_ns=T0 + k * NS_PER_S)) for k in range(10)]
    status = [r.status for r in rows if r is not None]
    assert status == ["queued"] * 3 + ["held"] * 7
    held = [r for r in rows if r is not None and r.status == "held"]
    assert all(desk.archive.deliveries(r.ivorn) == [] for r in held)  # archived, never sent
    # 6 per hour: ten minutes of event time later there is one token again
    later = desk.consider(excess_candidate(far=100.0, t_ns=T0 + 700 * NS_PER_S))
    assert later is not None and later.status == "queued"
    desk.archive.close()
    # a restart rebuilds the bucket from the archive: still empty right after
    cfg = config(burst=3, max_per_hour=6.0)
    assert _statuses_after_restart(
        tmp_path, cfg, [excess_candidate(far=100.0, t_ns=T0 + 701 * NS_PER_S)]
    ) == ["held"]


def test_public_bucket_not_starved_by_internal_storm(tmp_path: Path) -> None:
    desk = _desk(tmp_path, config(burst=2, max_per_hour=1.0))
    storm = [desk.consider(excess_candidate(far=100.0, t_ns=T0 + k * NS_PER_S)) for k in range(4)]
    assert [r.status for r in storm if r is not None] == ["queued"] * 2 + ["held"] * 2
    # the internal bucket is empty; a public alert is limited by its own bucket only
    pubs = [
        desk.consider(front_candidate(far=0.1, t_ns=T0 + (5 + k) * NS_PER_S, cid=f"f{k}"))
        for k in range(3)
    ]
    assert [r.status for r in pubs if r is not None] == ["queued", "queued", "held"]
    queued = next(r for r in pubs if r is not None)
    assert {d.sink for d in desk.archive.deliveries(queued.ivorn)} >= {"dir", "vtp:obs-a"}
    # internal alerts stay held: the public ones did not refill their bucket
    r = desk.consider(excess_candidate(far=100.0, t_ns=T0 + 9 * NS_PER_S))
    assert r is not None and r.status == "held"
    desk.archive.close()
    # a restart rebuilds both buckets from the archive with the same takes: both empty
    later = [
        excess_candidate(far=100.0, t_ns=T0 + 10 * NS_PER_S),
        front_candidate(far=0.1, t_ns=T0 + 11 * NS_PER_S, cid="f9"),
    ]
    cfg = config(burst=2, max_per_hour=1.0)
    assert _statuses_after_restart(tmp_path, cfg, later) == ["held", "held"]


def test_public_alerts_count_in_the_internal_bucket(tmp_path: Path) -> None:
    """Public alerts reach our own sinks too, so they take internal tokens while any
    are left (and internal alerts then wait), but are never held for want of one."""
    desk = _desk(tmp_path, config(burst=2, max_per_hour=1.0))
    pubs = [
        desk.consider(front_candidate(far=0.1, t_ns=T0 + k * NS_PER_S, cid=f"f{k}"))
        for k in range(2)
    ]
    assert [r.status for r in pubs if r is not None] == ["queued", "queued"]
    r = desk.consider(excess_candidate(far=100.0, t_ns=T0 + 3 * NS_PER_S))
    assert r is not None and r.status == "held"


def test_archive_refuses_to_mix_roles(tmp_path: Path) -> None:
    cfg = config(role="test")
    Archive(tmp_path / "a.sqlite", stream=cfg.stream_ivorn, role="test").close()
    with pytest.raises(ConfigError, match="never mix"):
        Archive(tmp_path / "a.sqlite", stream=cfg.stream_ivorn, role="observation")
    with pytest.raises(ConfigError, match="holds stream"):
        Archive(tmp_path / "a.sqlite", stream="ivo://other.example/x", role="test")


def test_per_trigger_thresholds_from_the_tune_snippet(tmp_path: Path) -> None:
    import tomllib

    from tocsin.tune.recommend import Recommendation, config_snippet

    recs = [
        Recommendation("coincidence", 1.0, 0.25, "measured", 0.1, 0, 1.0, 0.1),
        Recommendation("excess", 1.0, 0.02, "measured", 0.1, 0, 1.0, 0.1),
    ]
    snippet = tomllib.loads(config_snippet(recs, "test"))
    cfg = config(**snippet["alerts"])  # the snippet pastes into the [alerts] table
    assert cfg.thresholds("coincidence") == (0.25, 365.25)
    assert cfg.thresholds("excess") == (0.02, 365.25)
    desk = _desk(tmp_path, cfg)
    pub = desk.consider(front_candidate(far=0.2))
    assert pub is not None and pub.level == "public"
    internal = desk.consider(excess_candidate(far=0.05))  # above the excess bound
    assert internal is not None and internal.level == "internal"


def test_other_seeds_of_one_cluster_join_its_alert_family(tmp_path: Path) -> None:
    desk = _desk(tmp_path)
    first = desk.consider(front_candidate(far=0.01))
    assert first is not None
    # the same front seen from its second hit: a separate candidate (and trial) in the
    # engine, but not a second alert; nor a third from the third hit
    second = front_candidate(far=0.5, skip=1)
    assert second.id != first.candidate_id
    assert desk.consider(second) is None
    # a later seed that scores better supersedes the family's alert
    better = front_candidate(far=0.001, skip=2)
    upd = desk.consider(better)
    assert upd is not None and upd.kind == "update" and upd.ivorn == first.ivorn + "-u1"
    assert read_alert(upd.xml).params["candidate_id"] == better.id
    # the alert that reports each candidate (the demo prints it under the candidate)
    reported = desk.archive.latest_for_source(better.id)
    assert reported is not None and reported.ivorn == upd.ivorn
    assert better.id != upd.candidate_id  # it joined another candidate's family
    first_rep = desk.archive.latest_for_source(first.source_id)
    assert first_rep is not None and first_rep.ivorn == first.ivorn
    assert desk.archive.latest_for_source("no-such-candidate") is None
    assert read_alert(upd.xml).citations == [(first.ivorn, "supersedes")]
    desk.archive.close()
    again = _desk(tmp_path)  # the families survive a restart (rebuilt from the archive)
    assert again.consider(front_candidate(far=0.002, skip=3)) is None
    assert again.consider(front_candidate(far=0.0001, skip=4)) is not None
    # a cluster that shares no hit is a new family
    other = again.consider(front_candidate(far=0.01, t_ns=T0 + 3_000_000_000))
    assert other is not None and other.kind == "new"


def test_update_rising_to_public_sends_the_cited_alert_first(tmp_path: Path) -> None:
    desk = _desk(tmp_path)
    first = desk.consider(front_candidate(far=50.0))
    assert first is not None and first.level == "internal"
    upd = desk.consider(front_candidate(far=0.5, revision=2, cid=first.candidate_id))
    assert upd is not None and upd.level == "public"
    assert {d.sink for d in desk.archive.deliveries(first.ivorn)} == {"dir", "mqtt", "vtp:obs-a"}
    order = [d.ivorn for d, _ in desk.archive.open_deliveries("vtp:")]
    assert order == [first.ivorn, upd.ivorn]  # the cited alert goes out first


def test_update_and_its_cited_deliveries_are_one_transaction(tmp_path: Path) -> None:
    """An update and the extra deliveries of the alert it cites are written together:
    a failure while queueing the cited alert leaves the update unarchived too."""
    desk = _desk(tmp_path)
    first = desk.consider(front_candidate(far=50.0))
    assert first is not None and first.level == "internal"
    arch = desk.archive
    upd = dataclasses.replace(first, ivorn=first.ivorn + "-u1", kind="update", level="public")
    sinks = ["dir", "vtp:obs-a"]
    # foreign keys are on: queueing an IVORN that is not archived fails inside the update's
    # transaction, which must then leave nothing behind
    with pytest.raises(sqlite3.IntegrityError):
        arch.insert_alert(upd, sinks, "2026-01-01T00:00:00+00:00", also_queue=["ivo://x/y#none"])
    assert arch.get(upd.ivorn) is None
    assert arch.deliveries(upd.ivorn) == []
    assert arch.insert_alert(upd, sinks, "2026-01-01T00:00:00+00:00", also_queue=[first.ivorn])
    assert {d.sink for d in arch.deliveries(first.ivorn)} == {"dir", "mqtt", "vtp:obs-a"}
    assert {d.sink for d in arch.deliveries(upd.ivorn)} == set(sinks)
