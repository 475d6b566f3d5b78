"""The DuckDB store: the single source of truth for everything the report shows.

Only ``ingest`` writes it, inside one transaction: a killed or failed ingest
leaves the previous store as it was. Ingest is idempotent: a shard whose bytes
are unchanged is skipped, a rewritten shard replaces its rows, a shard the
study no longer names loses its rows. Everything else opens it read-only.
"""

from __future__ import annotations

import json
import sys
import time
from contextlib import contextmanager
from pathlib import Path
from typing import Iterable, Iterator, Mapping

import duckdb
import pyarrow as pa

from estbench.analyse.measures import performance_and_checks
from estbench.core.errors import UserError, entry_point
from estbench.core.hashing import canonical_json, file_sha256
from estbench.core.layout import ResultsLayout
from estbench.simulate.dgms import build_dgm
from estbench.simulate.shard import SHARD_SCHEMA, ShardProblem, estimator_code_hash, verify_shard
from estbench.study.allocation import with_allocation
from estbench.study.jobs import job_of_piece, shard_paths
from estbench.study.load import load_study
from estbench.study.model import Study

#: Tables describing the study; rebuilt by every ingest, so they follow the code's schema.
_STUDY_DDL = """
CREATE OR REPLACE TABLE study (
    name VARCHAR, description VARCHAR, seed VARCHAR, replicates BIGINT,
    replicates_run BIGINT, block_size BIGINT, blocks_per_job BIGINT, n_blocks BIGINT,
    level DOUBLE, reference VARCHAR, targets VARCHAR, max_failed_share DOUBLE, study_yaml VARCHAR,
    ingested_at VARCHAR);
CREATE OR REPLACE TABLE scenarios (
    scenario VARCHAR PRIMARY KEY, dgm VARCHAR, n BIGINT, spec VARCHAR, swept VARCHAR,
    dgm_description VARCHAR, position BIGINT, replicates BIGINT);
CREATE OR REPLACE TABLE truths (
    scenario VARCHAR, estimand VARCHAR, value DOUBLE, mcse DOUBLE, crb DOUBLE);
CREATE OR REPLACE TABLE estimators (
    estimator VARCHAR PRIMARY KEY, function VARCHAR, target VARCHAR, args VARCHAR,
    description VARCHAR, code_hash VARCHAR, is_reference BOOLEAN, position BIGINT);
CREATE OR REPLACE VIEW truth AS
    SELECT t.scenario, e.estimator, t.value AS truth
    FROM truths t JOIN estimators e ON t.estimand = e.target;
CREATE OR REPLACE VIEW crb AS
    SELECT t.scenario, e.estimator, t.crb
    FROM truths t JOIN estimators e ON t.estimand = e.target WHERE isfinite(t.crb);
"""

#: Tables of results; kept across ingests.
_DDL = """
CREATE TABLE IF NOT EXISTS shards (
    path VARCHAR PRIMARY KEY, scenario VARCHAR, estimator VARCHAR, first_block BIGINT,
    n_blocks BIGINT, rows BIGINT, bytes BIGINT, sha256 VARCHAR, ingested_at VARCHAR);
CREATE TABLE IF NOT EXISTS provenance (
    path VARCHAR PRIMARY KEY, seed VARCHAR, scenario_spawn_key VARCHAR, function VARCHAR,
    code_hash VARCHAR, estbench VARCHAR, numpy VARCHAR, scipy VARCHAR, pyarrow VARCHAR,
    python VARCHAR, seconds DOUBLE, created VARCHAR);
CREATE TABLE IF NOT EXISTS estimates (
    scenario VARCHAR, estimator VARCHAR, block BIGINT, rep BIGINT, estimate DOUBLE,
    se DOUBLE, ci_low DOUBLE, ci_high DOUBLE, p_value DOUBLE, status VARCHAR, message VARCHAR);
"""


#: Words of DuckDB's errors that mean the store file itself is damaged (cut short,
#: overwritten, a failed checksum), not that a query is wrong.
_DAMAGE_SIGNS = ("not a valid duckdb database file", "could not read enough bytes", "corrupt database file")


def damaged_store(store: Path | str, detail: str) -> UserError:
    """The error for a store file that cannot be read: what to do about it."""
    store = Path(store)
    if store.is_absolute() and store.is_relative_to(Path.cwd()):
        store = store.relative_to(Path.cwd())
    return UserError(f"the store {store} is damaged ({detail}); delete it and run `estbench run` again: "
                     f"the shards are kept, so the run only loads them into a new store")


@contextmanager
def reading_store(store: Path | str) -> Iterator[None]:
    """Turn DuckDB's errors about a damaged store file into ``damaged_store``;
    other errors (a bug, a wrong query) pass unchanged."""
    try:
        yield
    except duckdb.Error as exc:
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        if any(sign in first.lower() for sign in _DAMAGE_SIGNS):
            raise damaged_store(store, first) from None
        raise


def open_read_only(store: Path | str, config: Mapping | None = None) -> duckdb.DuckDBPyConnection:
    """Open the store for reading (with DuckDB settings *config*); a clear ``UserError``
    if it is missing, busy, or damaged: not a DuckDB file, or shorter than the blocks it
    records (cut short by a full disk or an interrupted copy)."""
    store = Path(store)
    if not store.exists():
        raise UserError(f"no store at {store}: run `estbench run` first")
    try:
        with reading_store(store):
            con = duckdb.connect(str(store), read_only=True, config=dict(config or {}))
    except duckdb.IOException as exc:
        if "lock" in str(exc).lower():
            raise UserError(f"the store {store} is being written by another process; "
                            f"try again when it finishes") from None
        raise UserError(f"cannot open the store {store}: {exc}") from None
    # Each block in use has its own place in the file. (Not checked while a write-ahead
    # log is waiting: its blocks live in memory until the next checkpoint.)
    size = store.stat().st_size
    [(block_size, blocks)] = con.execute("SELECT block_size, used_blocks FROM pragma_database_size() "
                                         "WHERE database_name = current_database()").fetchall()
    if size < block_size * blocks and not store.with_name(f"{store.name}.wal").exists():
        con.close()
        raise damaged_store(store, f"{size:,} bytes, shorter than the {blocks} blocks of "
                                   f"{block_size:,} bytes it uses")
    return con


#: Ingest streams Parquet row groups into the store; with these settings DuckDB keeps
#: its memory under the limit (spilling to ``<store>.tmp``) whatever the number of rows.
#: Row order is not preserved, which no measure depends on.
INGEST_SETTINGS = {"memory_limit": "256MB", "preserve_insertion_order": False}


def _send_back(path: Path, problem: str, study: Study) -> UserError:
    """Remove a bad or missing shard and the record of the job that writes it, so the
    next run recomputes it; list it in the recompute marker; return the error to raise."""
    layout = ResultsLayout.of_shard(path)
    path.unlink(missing_ok=True)
    job = job_of_piece(study).get((path.parent.parent.name, int(path.stem)))
    if job is not None:
        layout.job_record(*job).unlink(missing_ok=True)
    with open(layout.recompute_marker, "a") as fh:
        fh.write(f"{path}\t{problem}\n")
    return UserError(f"shard {path} {problem}; it was removed and will be recomputed on the next run")


def _check_shard(path: Path, study: Study) -> dict:
    """Metadata of a sound shard; a corrupt one is sent back (see ``_send_back``)."""
    try:
        meta = verify_shard(path)
        if meta["block_size"] != study.block_size:
            raise ShardProblem(f"has block_size {meta['block_size']}, the study {study.block_size}")
    except ShardProblem as exc:
        raise _send_back(path, str(exc), study) from None
    return meta


def _sql_str(path) -> str:
    return str(path).replace("'", "''")


def _insert_rows(con, table: str, rows: list) -> None:
    """Insert *rows* (lists in the table's column order) in one statement, through Arrow:
    ``executemany`` runs a statement per row (1.3 s for 1,600 shards)."""
    if not rows:
        return
    columns = {f"c{i}": pa.array(list(values)) for i, values in enumerate(zip(*rows))}
    con.register("rows_in", pa.table(columns))
    try:
        con.execute(f"INSERT INTO {table} SELECT * FROM rows_in")
    finally:
        con.unregister("rows_in")


def _write_study_tables(con, study: Study) -> None:
    import yaml
    now = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    con.execute(_STUDY_DDL)
    con.execute("INSERT INTO study VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?)", [
        study.name, study.description, str(study.seed), study.replicates, study.replicates_run,
        study.block_size, study.blocks_per_job, study.n_blocks, study.level, study.reference,
        json.dumps(study.targets), study.max_failed_share,
        yaml.safe_dump(dict(study.raw), sort_keys=False), now])
    scen_rows, truth_rows = [], []
    for pos, s in enumerate(study.scenarios):
        scen_rows.append([s.key, s.dgm, s.n, canonical_json(s.spec), json.dumps(s.swept),
                          study.dgms[s.dgm].get("description", ""), pos,
                          study.blocks_of(s.key) * study.block_size])
        dgm = build_dgm(s.spec, study.search_dirs, study.seed)
        truth_rows += [[s.key, e, dgm.truth(e), dgm.truth_mcse(e), dgm.crb(e, s.n)]
                       for e in dgm.estimands()]
    _insert_rows(con, "scenarios", scen_rows)
    _insert_rows(con, "truths", truth_rows)
    est_rows = []
    for pos, e in enumerate(study.estimators.values()):
        code = estimator_code_hash(e.function, study.search_dirs)
        est_rows.append([e.name, e.function, e.target, canonical_json(e.args), e.description,
                         code, e.name == study.reference, pos])
    _insert_rows(con, "estimators", est_rows)


def measure_options(study: Study) -> dict:
    """Keyword arguments of the measure functions for this study's store."""
    return {"reference": study.reference, "level": study.level, "crb": "crb"}


def _write_derived(con, study: Study) -> None:
    """Recompute the performance and checks tables from the estimates."""
    performance, checks = performance_and_checks(con, "estimates", "truth", study.targets,
                                                 **measure_options(study))
    tables = {"performance": performance, "checks": checks}
    for name, table in tables.items():
        con.register("derived_in", table)
        con.execute(f"CREATE OR REPLACE TABLE {name} AS SELECT * FROM derived_in")
        con.unregister("derived_in")


def ingest(store: Path | str, study: Study, shards: Iterable[Path | str], threads: int | None = None) -> dict:
    """Bring the store up to date with *shards* and recompute the measures.

    *threads* caps DuckDB's threads (default: one per core); the results do
    not depend on it. Returns counts (shards added, replaced, removed and
    unchanged, and rows) and seconds.
    """
    start = time.perf_counter()
    store = Path(store)
    shards = [Path(p) for p in shards]
    for path in shards:
        if not path.exists():
            raise _send_back(path, "is missing", study)
    wanted = {str(p): p for p in shards}
    digests = {str(p): file_sha256(p) for p in shards}
    store.parent.mkdir(parents=True, exist_ok=True)
    existed = store.exists()
    con = duckdb.connect(str(store), config=INGEST_SETTINGS | ({"threads": threads} if threads else {}))
    try:
        con.execute(_DDL)
        con.execute("BEGIN TRANSACTION")
        known = dict(con.execute("SELECT path, sha256 FROM shards").fetchall())
        stale = [p for p, digest in known.items() if digests.get(p) != digest]
        fresh = [p for p in wanted if known.get(p) != digests[p]]
        if stale:
            con.execute("CREATE TEMP TABLE stale AS SELECT scenario, estimator, first_block, "
                        "first_block + n_blocks AS end_block, path FROM shards "
                        "WHERE list_contains(?, path)", [stale])
            con.execute("DELETE FROM estimates USING stale s WHERE estimates.scenario = s.scenario "
                        "AND estimates.estimator = s.estimator AND estimates.block >= s.first_block "
                        "AND estimates.block < s.end_block")
            con.execute("DELETE FROM shards WHERE list_contains(?, path)", [stale])
            con.execute("DELETE FROM provenance WHERE list_contains(?, path)", [stale])
            con.execute("DROP TABLE stale")
        now = time.strftime("%Y-%m-%dT%H:%M:%S%z")
        metas = {p: _check_shard(wanted[p], study) for p in sorted(fresh)}
        if metas:  # one statement: DuckDB reads the files in parallel, streaming row groups
            files = ", ".join(f"'{_sql_str(wanted[p])}'" for p in metas)
            con.execute(f"INSERT INTO estimates SELECT {', '.join(SHARD_SCHEMA.names)} "
                        f"FROM read_parquet([{files}])")
            _insert_rows(con, "shards", [
                [p, m["scenario"], m["estimator"], m["first_block"], m["n_blocks"], m["rows"],
                 wanted[p].stat().st_size, digests[p], now] for p, m in metas.items()])
            _insert_rows(con, "provenance", [
                [p, m["seed"], m["scenario_spawn_key"], m["function"], m["code_hash"],
                 *(m["versions"][k] for k in ("estbench", "numpy", "scipy", "pyarrow", "python")),
                 m["seconds"], m["created"]] for p, m in metas.items()])
        _write_study_tables(con, study)
        _write_derived(con, study)
        rows = con.execute("SELECT count(*) FROM estimates").fetchone()[0]
        con.execute("COMMIT")
        con.execute("CHECKPOINT")
    except BaseException:
        con.close()
        if not existed:  # no store to go back to (a full disk, say): leave no half-made one
            for path in (store, store.with_name(f"{store.name}.wal")):
                path.unlink(missing_ok=True)
        raise
    con.close()
    return {"added": len([p for p in fresh if p not in known]), "replaced": len([p for p in fresh if p in known]),
            "removed": len([p for p in stale if p not in wanted]),
            "unchanged": len(wanted) - len(fresh), "rows": rows,
            "seconds": round(time.perf_counter() - start, 3)}


def check_store(store: Path | str) -> None:
    """``UserError`` if the store exists but cannot be opened (see ``open_read_only``)."""
    if Path(store).exists():
        open_read_only(store).close()


def read_table(store: Path | str, sql: str, params=None) -> pa.Table:
    """Run one read-only query against the store and return an Arrow table."""
    con = open_read_only(store)
    try:
        with reading_store(store):
            return con.sql(sql, params=params).to_arrow_table()
    finally:
        con.close()


@entry_point
def main(argv=None) -> int:
    """``python -m estbench.analyse.store``: the ingest step of the workflow."""
    import argparse

    parser = argparse.ArgumentParser(prog="python -m estbench.analyse.store",
                                     description="Ingest a study's shards into its store (used by the workflow).")
    parser.add_argument("--study", required=True, help="the study file")
    parser.add_argument("--store", required=True, help="the DuckDB store to bring up to date")
    parser.add_argument("--threads", type=int, default=None, help="DuckDB threads (default: one per core)")
    args = parser.parse_args(argv)
    layout = ResultsLayout.of_store(args.store)
    study = with_allocation(load_study(args.study), layout.workdir)
    with reading_store(layout.store):
        summary = ingest(layout.store, study, shard_paths(study, layout), threads=args.threads)
    print(json.dumps(summary), file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
