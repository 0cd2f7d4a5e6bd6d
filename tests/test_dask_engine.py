"""The Dask engine gives the local engine's results on a partitioned ledger.

One Dask cluster (a scheduler and two single-threaded worker processes on 127.0.0.1) serves the
module; every engine call reaches it by its address, as ``--scheduler`` would. The scheduler
retries a task once after its worker dies (``allowed-failures`` 1), so the failure tests stay
short. One CLI test starts its own local cluster (no ``--scheduler``).

The local engine is not the only reference: the pieces are checked against the part files cut
by hand, the counts against the decisions the fixture writes, and the estimates against IPS and
SNIPS computed with numpy from the ledger's tables.
"""

from __future__ import annotations

import importlib.util
import json
import os
import shutil
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any
from unittest import mock

import dask
import dask_shop as shop
import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from coin_batches import coin_batches

import drawledger as dl
from drawledger import _parquet
from drawledger.cli import main
from drawledger.exceptions import EstimateRefusedError, ReplayError
from drawledger.replay import estimate, sources, sweep, verify
from drawledger.replay.audit import audit
from drawledger.replay.engines import NO_PROFILER
from drawledger.replay.engines import _dask as dask_engine
from drawledger.replay.sources import iter_chunks

ROOT = Path(__file__).resolve().parent.parent
SUPPORT = ROOT / "tests" / "support"
CHUNK = 120  # decisions per piece: the ledger below makes about ten pieces
DAY = 86_400.0
START = 1_767_225_600.0  # 2026-01-01 00:00 UTC
# Decisions per stream that _record writes (one draw each): the reference counts below.
DECISIONS = {"recipe-card": 600, "reminder-delay": 150, "free-delivery": 120, "legacy-coupon": 86}


def _record(root: Path, fuse: Path) -> None:
    """Two days of four streams: softmax cards, log-normal delays, buckets, declared draws.

    A second writer (another ``Ledger`` on the same directory) records the declared draws.
    """
    led = dl.Ledger(root, format="parquet", batch_size=150)
    legacy = dl.Ledger(root, format="parquet", batch_size=50)
    shop.use(led)
    rng = np.random.default_rng(7)
    clock = [START]
    with mock.patch("time.time", lambda: clock[0]):
        for i in range(600):
            clock[0] = START + (DAY if i >= 300 else 0.0) + i
            ctx = shop.context(i, fuse=str(fuse) if i == 5 else None)
            did = f"card-{i}"
            card = shop.feature_card(ctx, decision_id=did, unit=f"shopper-{i % 300}")
            chance = shop.CHECKOUT[i % 4][shop.CARDS.index(card)]
            led.outcome(did, "checkout", float(rng.random() < chance))
            if i % 4 == 0:
                shop.reminder_delay({"items": 1 + i % 9}, decision_id=f"delay-{i}")
            if i % 5 == 0:
                led.bucket(f"shopper-{i}", {"standard": 0.5, "free": 0.5}, "free-delivery")
            if i % 7 == 0:
                legacy.record_draw("legacy-coupon", "bernoulli", {"p": 0.3}, bool(i % 3 == 0),
                                0.3 if i % 3 == 0 else 0.7, unit=f"shopper-{i}")  # fmt: skip
    led.close()
    legacy.close()


@pytest.fixture(scope="module")
def fuse(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Where the fuse files of ``dask_shop.feature_card`` go (absent: nothing happens)."""
    return tmp_path_factory.mktemp("fuse") / "fuse"


@pytest.fixture(scope="module")
def ledger(tmp_path_factory: pytest.TempPathFactory, fuse: Path) -> Path:
    root = tmp_path_factory.mktemp("dask") / "ledger"
    _record(root, fuse)
    return root


@pytest.fixture(scope="module")
def gapped(ledger: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Without a part of cards and one of buckets (gaps, orphan outcomes); delays twice."""
    root = tmp_path_factory.mktemp("gapped") / "ledger"
    shutil.copytree(ledger, root)
    for stream, k in (("recipe-card", 1), ("free-delivery", 3)):  # parts of two batches
        part = sorted((root / "decisions" / stream).rglob("*.parquet"))[k]
        part.unlink()
        (root / "draws" / part.relative_to(root / "decisions")).unlink(missing_ok=True)
    part = sorted((root / "decisions" / "reminder-delay").rglob("*.parquet"))[0]
    first, last, tag = part.stem.split("-")
    shutil.copy(part, part.with_name(f"{int(first) + 1:012d}-{last}-{tag}.parquet"))  # twice
    return root


@pytest.fixture(scope="module")
def scheduler() -> Iterator[str]:
    from distributed import LocalCluster

    with dask.config.set({"distributed.scheduler.allowed-failures": 1, **NO_PROFILER}):
        cluster = LocalCluster(
            n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
            scheduler_port=0, dashboard_address=":0",
        )  # fmt: skip
    yield cluster.scheduler_address
    cluster.close()


def _verify(ledger: Path, **kw: Any) -> Any:
    return verify(ledger, path=[SUPPORT], chunk_size=CHUNK, **kw)


def test_the_ledger_is_partitioned_by_stream_and_date(ledger: Path) -> None:
    names = [p.name for p in sources.partitions(ledger)]
    streams = {n.split("/")[0] for n in names}
    assert {"recipe-card", "reminder-delay", "free-delivery", "legacy-coupon"} == streams
    assert {"2026-01-01", "2026-01-02"} == {n.split("/")[1] for n in names}


def _cut_by_hand(root: Path) -> list[list[Path]]:
    """The decision part files in path order, cut after each run of at least CHUNK rows (row
    counts from the Parquet footers): the cut the local engine makes, written out here."""
    out: list[list[Path]] = [[]]
    rows = 0
    for path in sorted((root / "decisions").rglob("*.parquet")):
        out[-1].append(path)
        rows += pq.read_metadata(path).num_rows
        if rows >= CHUNK:
            out.append([])
            rows = 0
    return [files for files in out if files]


def _ids(files: list[Path]) -> list[str]:
    return [i for f in files for i in pq.read_table(f, columns=["decision_id"])[0].to_pylist()]


def test_pieces_and_local_chunks_are_the_part_files_cut_by_hand(ledger: Path) -> None:
    """Each piece, and each chunk of the local engine, holds the decisions of the part files of
    one hand-made cut, in path order."""
    expected = _cut_by_hand(ledger)
    plan = sources.pieces(sources.partitions(ledger), CHUNK)
    assert [[os.fspath(f) for f in files] for files in expected] == [list(p.parts) for p in plan]
    ids = [_ids(files) for files in expected]
    assert [len(i) for i in ids] == [p.rows for p in plan]
    assert ids == [[r[0] for r in sources.read_piece(p)[0]] for p in plan]
    assert ids == [[r[0] for r in rows] for rows, _ in iter_chunks(ledger, size=CHUNK)]
    assert sum(DECISIONS.values()) == sum(len(i) for i in ids)
    assert len(plan) > 4


def _by_numpy(ledger: Path, temperature: float) -> dict[str, float]:
    """IPS and SNIPS of the recipe cards at ``temperature``, and the logged mean reward,
    straight from the ledger's tables: the softmax p_j = exp((s_j - max s) / T) / sum_k
    exp((s_k - max s) / T) of docs/draw-spec.md over the recorded scores, the recorded
    propensities, and the checkout outcomes (0 when missing)."""
    cards = pd.read_parquet(ledger / "decisions" / "recipe-card")
    outcomes = pd.read_parquet(ledger / "outcomes")
    checkout = outcomes[outcomes["name"] == "checkout"].groupby("decision_id")["value"].sum()
    r = checkout.reindex(cards["decision_id"]).fillna(0.0).to_numpy()
    p = np.empty(len(cards))
    for k, (inputs, action) in enumerate(zip(cards["inputs"], cards["action"], strict=True)):
        ctx = json.loads(inputs)["ctx"]
        s = np.asarray(ctx["scores"])
        e = np.exp((s - s.max()) / temperature)
        p[k] = e[ctx["cards"].index(json.loads(action))] / e.sum()
    w = p / cards["propensity"].to_numpy()
    return {"ips": float(np.mean(w * r)), "snips": float(np.sum(w * r) / np.sum(w)),
            "logging": float(np.mean(r))}  # fmt: skip


def test_verify_counts_and_rows_equal_the_local_engine(ledger: Path, scheduler: str) -> None:
    local = _verify(ledger)
    remote = _verify(ledger, engine="dask", scheduler=scheduler)
    assert local.to_dict() == remote.to_dict()
    assert {"declared"} == set(local.by_reason)  # the legacy coupons: audited, not replayed
    assert local.ok and sum(DECISIONS.values()) == local.decisions
    assert DECISIONS == {s: c["decisions"] for s, c in local.to_dict()["by_stream"].items()}
    assert sum(DECISIONS.values()) - DECISIONS["legacy-coupon"] == local.verified
    assert local.rows.equals(remote.rows)


def test_verify_with_an_integrity_problem_equals_the_local_engine(
    gapped: Path, scheduler: str
) -> None:
    """Flagged decisions are replayed again with their flags: counts as the local engine's."""
    local = _verify(gapped, keep_rows=False)
    remote = _verify(gapped, engine="dask", scheduler=scheduler, keep_rows=False)
    assert local.to_dict() == remote.to_dict()
    assert not remote.ok and remote.by_reason["integrity"] >= 1
    assert remote.integrity.gaps > 0 and remote.integrity.orphan_outcomes > 0
    assert remote.integrity.duplicates > 0
    assert 2 == remote.integrity.writers


def test_outcomes_missing_from_a_last_batch_count_as_the_local_engine(
    tmp_path: Path, scheduler: str
) -> None:
    """A writer stopped between the renames of its last batch: not a gap on either engine."""
    root = tmp_path / "ledger"
    coin_batches(root, 2, 4)
    _parquet.parts(root, "outcomes")[-1].path.unlink()  # the last batch's outcomes
    local = _verify(root, keep_rows=False)
    remote = _verify(root, engine="dask", scheduler=scheduler, keep_rows=False)
    assert local.to_dict() == remote.to_dict()
    assert (True, 0, 4) == (remote.ok, remote.integrity.gaps,
                            remote.integrity.uncommitted_records)  # fmt: skip


def test_audit_statistics_equal_the_local_engine(ledger: Path, scheduler: str) -> None:
    local = audit(ledger, chunk_size=CHUNK)
    remote = audit(ledger, chunk_size=CHUNK, engine="dask", scheduler=scheduler)
    assert local.to_dict() == remote.to_dict()
    tests = local.to_dict()["tests"]
    assert sum(DECISIONS.values()) == local.to_dict()["decisions"]
    assert DECISIONS == {t["stream"]: t["n"] for t in tests if t["test"] == "consistency"}


def _close(expected: Any, actual: Any, path: str = "") -> None:
    """Nested JSON equal, numbers within 1e-9 relative."""
    if isinstance(expected, dict):
        assert expected.keys() == actual.keys(), path
        for key in expected:
            _close(expected[key], actual[key], f"{path}.{key}")
    elif isinstance(expected, list):
        assert len(expected) == len(actual), path
        for i, (e, a) in enumerate(zip(expected, actual, strict=True)):
            _close(e, a, f"{path}[{i}]")
    elif isinstance(expected, float):
        assert expected == pytest.approx(actual, rel=1e-9, abs=1e-12), path
    else:
        assert expected == actual, path


def test_estimates_equal_the_local_engine(ledger: Path, scheduler: str) -> None:
    """A what-if on one stream of the several: estimates, intervals, diagnostics, segments."""
    kw: dict[str, Any] = dict(reward="checkout", stream="recipe-card", path=[SUPPORT],
                              overrides={"temperature": 0.3}, by="input.ctx.segment")  # fmt: skip
    local = estimate(ledger, **kw)
    remote = estimate(ledger, engine="dask", scheduler=scheduler, **kw)
    _close(local.to_dict(), remote.to_dict())
    np.testing.assert_allclose(local.weights, remote.weights, rtol=1e-12)
    assert DECISIONS["recipe-card"] == remote.n
    assert {"ips", "snips", "clipped", "dr"} == set(remote.estimates)
    expected = _by_numpy(ledger, 0.3)
    assert expected["ips"] == pytest.approx(local.estimates["ips"]["value"], rel=1e-9)
    assert expected["snips"] == pytest.approx(local.estimates["snips"]["value"], rel=1e-9)
    assert expected["logging"] == pytest.approx(local.logging_value, rel=1e-9)


def test_bootstrap_intervals_equal_the_local_engine(ledger: Path, scheduler: str) -> None:
    """The per-piece Poisson bootstrap, seeded, gives the local engine's intervals."""
    kw: dict[str, Any] = dict(reward="checkout", stream="recipe-card", path=[SUPPORT],
                              overrides={"temperature": 0.3}, interval="bootstrap",
                              bootstrap=300, seed=7)  # fmt: skip
    local = estimate(ledger, **kw)
    _close(local.to_dict(), estimate(ledger, engine="dask", scheduler=scheduler, **kw).to_dict())
    assert 300 == local.settings["bootstrap"]
    ips = local.estimates["ips"]
    assert _by_numpy(ledger, 0.3)["ips"] == pytest.approx(ips["value"], rel=1e-9)
    assert ips["low"] < ips["value"] < ips["high"]


def test_a_sweep_equals_the_local_engine(ledger: Path, scheduler: str) -> None:
    kw: dict[str, Any] = dict(reward="checkout", stream="recipe-card", path=[SUPPORT],
                              param="temperature", values=[0.3, 1.0])  # fmt: skip
    local = sweep(ledger, **kw).to_dict()
    _close(local, sweep(ledger, engine="dask", scheduler=scheduler, **kw).to_dict())
    for point in local["points"]:
        expected = _by_numpy(ledger, point["value"])
        assert expected["snips"] == pytest.approx(point["estimates"]["snips"]["value"], rel=1e-9)


def test_an_estimate_of_a_gapped_ledger_is_refused_on_both_engines(
    gapped: Path, scheduler: str
) -> None:
    """Parts deleted from the ledger fail its integrity check: no estimate on either engine."""
    kw: dict[str, Any] = dict(reward="checkout", stream="recipe-card", path=[SUPPORT])
    for engine in ({}, {"engine": "dask", "scheduler": scheduler}):
        with pytest.raises(EstimateRefusedError, match=r"integrity check \(.*gaps: ") as refused:
            estimate(gapped, **kw, **engine)
        assert refused.value.problems["gaps"] > 0


def test_estimate_errors_match_the_local_engine(ledger: Path, scheduler: str) -> None:
    cases: list[tuple[dict[str, Any], str]] = [
        ({}, "several decision streams"),
        ({"stream": "window-seat"}, "no decisions of stream"),
        ({"stream": "recipe-card", "reward": "refund"}, "no outcome named"),
        ({"stream": "reminder-delay"}, "no decision of stream 'reminder-delay' has a 'checkout' "
         "outcome; its outcomes are: none"),
    ]  # fmt: skip
    for kw, message in cases:
        args: dict[str, Any] = {"reward": "checkout", "path": [SUPPORT], **kw}
        with pytest.raises(ReplayError, match=message):
            estimate(ledger, engine="dask", scheduler=scheduler, **args)


def test_a_worker_that_dies_once_is_retried_and_results_are_complete(
    ledger: Path, fuse: Path, scheduler: str
) -> None:
    expected = _verify(ledger, keep_rows=False).to_dict()
    fuse.mkdir()
    (fuse / "1").touch()
    try:
        remote = _verify(ledger, engine="dask", scheduler=scheduler, keep_rows=False)
        assert [] == list(fuse.iterdir())  # the worker did die once
    finally:
        shutil.rmtree(fuse)
    assert expected == remote.to_dict()


def test_a_worker_that_dies_every_time_fails_the_command(
    ledger: Path, fuse: Path, scheduler: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """No partial numbers: the CLI exits 2 with one line naming the lost piece, no JSON."""
    fuse.mkdir()
    for k in range(6):
        (fuse / str(k)).touch()
    out = tmp_path / "verify.json"
    try:
        code = main(["verify", str(ledger), "--path", str(SUPPORT), "--engine", "dask",
                     "--scheduler", scheduler, "--json", str(out)])  # fmt: skip
    finally:
        shutil.rmtree(fuse)
    err = capsys.readouterr().err.strip().splitlines()
    assert 2 == code
    assert 1 == len(err) and "worker died" in err[0] and "piece" in err[0]
    assert not out.exists()


def test_an_unreachable_scheduler_is_a_clear_error(
    ledger: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(dask_engine, "CONNECT_TIMEOUT", 1.0)
    started = time.monotonic()
    with pytest.raises(
        ReplayError, match=r"cannot reach the Dask scheduler at 'tcp://127\.0\.0\.1:9'"
    ):
        audit(ledger, engine="dask", scheduler="tcp://127.0.0.1:9")
    assert time.monotonic() - started < 30


def test_a_sqlite_ledger_is_refused_before_any_cluster_starts(tmp_path: Path) -> None:
    led = dl.Ledger(tmp_path / "x.db")
    led.record_draw("legacy-coupon", "bernoulli", {"p": 0.3}, True, 0.3)
    led.close()
    with pytest.raises(ReplayError, match="partitioned Parquet"):
        verify(tmp_path / "x.db", engine="dask")


def test_the_synthetic_benchmark_ledger_replays(tmp_path: Path, scheduler: str) -> None:
    """tests/benchmarks/synth.py writes rows that verify: seeds, uniforms, hashes all agree."""
    spec = importlib.util.spec_from_file_location("synth", ROOT / "tests/benchmarks/synth.py")
    assert spec is not None and spec.loader is not None
    synth = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(synth)
    root = synth.generate(tmp_path / "synthetic", 600, days=3, writers=1)
    local = verify(root, path=[SUPPORT], keep_rows=False, chunk_size=100)
    assert local.ok and 600 == local.verified and local.integrity.ok
    assert {"recipe-card", "reminder-delay"} == set(local.by_stream)
    assert 6 == len(sources.partitions(root))
    remote = verify(root, path=[SUPPORT], keep_rows=False, chunk_size=100, engine="dask",
                    scheduler=scheduler)  # fmt: skip
    assert local.to_dict() == remote.to_dict()


def test_the_cli_starts_a_local_cluster_without_scheduler(
    ledger: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """``--engine dask`` alone starts a local cluster (one worker per core) for the run."""
    monkeypatch.setattr(os, "cpu_count", lambda: 1)  # one core: one worker process to start
    local, remote = tmp_path / "local.json", tmp_path / "dask.json"
    assert 0 == main(["audit", str(ledger), "--json", str(local)])
    assert 0 == main(["audit", str(ledger), "--engine", "dask", "--json", str(remote)])
    assert json.loads(local.read_text()) == json.loads(remote.read_text())
