"""The store: idempotent ingest, replaced and removed shards, failures leave it intact."""

import duckdb
import pytest

from estbench.study import jobs
from estbench.core.errors import UserError
from estbench.simulate.job import run_shard
from estbench.analyse.store import ingest
from estbench.study.load import study_from_mapping

from conftest import tiny_study, write_study


def _setup(tmp_path, **overrides):
    raw = tiny_study(**overrides)
    study = study_from_mapping(raw, source=write_study(tmp_path, raw))
    paths = jobs.shard_paths(study, study.layout(tmp_path))
    for p in paths:
        if not p.exists():
            spec = jobs.shard_spec(study, p.parts[-3], p.parts[-2], int(p.stem))
            run_shard(spec, study.search_dirs, p)
    return study, paths


def _count(store, sql="SELECT count(*) FROM estimates"):
    con = duckdb.connect(str(store), read_only=True)
    try:
        return con.execute(sql).fetchone()[0]
    finally:
        con.close()


def test_reingest_adds_nothing(tmp_path):
    study, paths = _setup(tmp_path)
    store = tmp_path / "store.duckdb"
    first = ingest(store, study, paths)
    assert first["added"] == len(paths) == 8 and first["rows"] == 2 * 2 * 60
    second = ingest(store, study, paths)
    assert second.pop("seconds") > 0
    assert second == {"added": 0, "replaced": 0, "removed": 0, "unchanged": 8, "rows": 240}
    assert _count(store) == 240
    assert _count(store, "SELECT count(*) FROM (SELECT DISTINCT scenario, estimator, rep FROM estimates)") == 240


def test_rewritten_shard_replaces_its_rows_and_dropped_estimator_leaves(tmp_path):
    study, paths = _setup(tmp_path)
    store = tmp_path / "store.duckdb"
    ingest(store, study, paths)
    # Rewrite one shard with different content (another seed), as a recomputation would.
    victim = paths[0]
    other = study_from_mapping(tiny_study(seed=999), source=study.source)
    run_shard(jobs.shard_spec(other, victim.parts[-3], victim.parts[-2], int(victim.stem)),
              study.search_dirs, victim)
    summary = ingest(store, study, paths)
    assert summary["replaced"] == 1 and summary["rows"] == 240
    # The study drops an estimator: its rows and shards leave the store.
    slim = tiny_study(estimators={"mean": {"function": "location:mean", "target": "mean"}})
    slim_study = study_from_mapping(slim, source=study.source)
    keep = jobs.shard_paths(slim_study, slim_study.layout(tmp_path))
    summary = ingest(store, slim_study, keep)
    assert summary["removed"] == 4 and summary["rows"] == 120
    assert _count(store, "SELECT count(DISTINCT estimator) FROM estimates") == 1
    assert _count(store, "SELECT count(*) FROM performance WHERE estimator = 'median'") == 0


def test_shards_written_before_a_kill_are_all_ingested_later(tmp_path):
    # A run killed after writing shards but before ingest: the next ingest takes them all.
    study, paths = _setup(tmp_path)
    store = tmp_path / "store.duckdb"
    ingest(store, study, paths[:3])
    assert _count(store) == 3 * 30
    summary = ingest(store, study, paths)
    assert summary["added"] == 5 and _count(store) == 240


def test_failed_ingest_leaves_the_previous_store(tmp_path):
    study, paths = _setup(tmp_path)
    store = tmp_path / "store.duckdb"
    ingest(store, study, paths[:4])
    paths[5].write_bytes(paths[5].read_bytes()[:100])  # truncated shard
    with pytest.raises(UserError, match=r"shard .*\.parquet unreadable .* will be recomputed"):
        ingest(store, study, paths)
    assert _count(store) == 4 * 30
    assert _count(store, "SELECT count(*) FROM shards") == 4
    assert not paths[5].exists()  # removed, so the next run recomputes it
    assert str(paths[5]) in (tmp_path / "results/tiny/shards-to-recompute.txt").read_text()


def test_bit_flip_inside_a_shard_is_caught_by_page_checksums(tmp_path):
    study, paths = _setup(tmp_path)
    data = bytearray(paths[2].read_bytes())
    data[40] ^= 0x40  # one flipped bit in the first data page; the footer stays readable
    paths[2].write_bytes(bytes(data))
    with pytest.raises(UserError, match="CRC checksum verification failed.*will be recomputed"):
        ingest(tmp_path / "store.duckdb", study, paths)
    assert not paths[2].exists()


def test_a_renamed_column_in_the_footer_is_caught(tmp_path):
    study, paths = _setup(tmp_path)
    data = paths[3].read_bytes()
    at = data.index(b"estimate")  # the column name in the footer's Parquet schema
    paths[3].write_bytes(data[:at] + b"estimatX" + data[at + 8:])
    with pytest.raises(UserError, match="has columns .* expected .*will be recomputed"):
        ingest(tmp_path / "store.duckdb", study, paths)


def test_performance_rows_match_the_estimates(tmp_path):
    study, paths = _setup(tmp_path)
    store = tmp_path / "store.duckdb"
    ingest(store, study, paths)
    con = duckdb.connect(str(store), read_only=True)
    try:
        bias = con.execute("""SELECT p.value FROM performance p JOIN scenarios s USING (scenario)
                              WHERE p.estimator = 'mean' AND s.n = 20 AND p.measure = 'bias'""").fetchone()[0]
        direct = con.execute("""SELECT avg(estimate) - 2.0 FROM estimates e JOIN scenarios s USING (scenario)
                                WHERE e.estimator = 'mean' AND s.n = 20""").fetchone()[0]
        tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    finally:
        con.close()
    assert bias == pytest.approx(direct, abs=1e-12)
    assert {"study", "scenarios", "truths", "estimators", "shards", "provenance", "estimates",
            "performance"} <= tables
