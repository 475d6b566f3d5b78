"""`estbench query` reads the store and nothing else: every statement that would write,
attach, load, copy, export, set or read a file is refused with exit 2 and one clear
line, and the store file stays byte for byte what it was.

The guards are estbench's statement check plus DuckDB's own read-only connection and
settings (enable_external_access = false, lock_configuration = true; DuckDB
documentation, "Securing DuckDB").
"""

import pytest
from conftest import cli_here, copy_project, run_cli, sha256

ONLY_READS = "`estbench query` only reads the store: it runs one SELECT"
NO_FILES = "file system operations are disabled by configuration (`estbench query` reads the store's tables only)"

#: SQL -> the words of the refusal. {out} is a path outside the store.
REFUSED = {
    "CREATE TABLE plots AS SELECT 1": ONLY_READS, "CREATE TEMP TABLE plots AS SELECT 1": "type CREATE",
    "CREATE MACRO twice(a) AS 2 * a": "type CREATE", "CREATE VIEW v AS SELECT 1": "type CREATE",
    "INSERT INTO estimates SELECT * FROM estimates LIMIT 1": "type INSERT",
    "UPDATE estimates SET estimate = 0": "type UPDATE", "DELETE FROM estimates": "type DELETE",
    "DROP TABLE estimates": "type DROP", "ALTER TABLE estimates ADD COLUMN x INT": "type ALTER",
    "ATTACH '{out}/other.duckdb' AS other": "type ATTACH", "DETACH store": "type DETACH",
    "COPY estimates TO '{out}/estimates.csv'": "type COPY", "COPY (SELECT 1) TO '/dev/stdout'": "type COPY",
    "EXPORT DATABASE '{out}/export'": "type EXPORT", "IMPORT DATABASE '{out}/export'": "type PRAGMA",
    "INSTALL httpfs": "type LOAD", "LOAD json": "type LOAD", "UPDATE EXTENSIONS": "not this statement",
    "SET memory_limit = '1GB'": "type SET", "RESET threads": "type SET", "SET VARIABLE plots = 3": "type SET",
    "PRAGMA enable_profiling": "type PRAGMA", "PRAGMA threads = 1": "type SET",
    "CHECKPOINT": "type CALL", "VACUUM": "type VACUUM", "CALL pragma_version()": "type CALL",
    "BEGIN TRANSACTION": "type TRANSACTION", "USE memory": "type SET",
    "SELECT 1; DROP TABLE estimates": "got 2 statements", "  ;  ": "got 0 statements",
    "SELECT * FROM read_csv('/etc/hostname')": NO_FILES, "SELECT * FROM read_text('/etc/hostname')": NO_FILES,
    "SELECT * FROM read_parquet('results/tiny/shards/*/mean/0.parquet')": NO_FILES,
    "SELECT * FROM 'results/tiny/performance.csv'": NO_FILES, "SELECT * FROM glob('/etc/*')": NO_FILES,
    "SELECT [1, 2] AS plots": "column 'plots' holds list<l: int32>, which a CSV cannot; cast it",
    "SELECT nope FROM estimates": "query failed: Binder Error",
}


@pytest.fixture(scope="module")
def project(finished_tiny, tmp_path_factory):
    return copy_project(finished_tiny, tmp_path_factory.mktemp("query"))


@pytest.mark.parametrize("sql", sorted(REFUSED))
def test_a_statement_that_is_not_a_read_is_refused(project, tmp_path, sql, capsys, monkeypatch):
    store = project / "results/tiny/store.duckdb"
    before, files = sha256(store), sorted(project.rglob("*"))
    code, out, err = cli_here(capsys, monkeypatch, project, "query", "study.yaml", sql.format(out=tmp_path))
    assert code == 2 and out == "", out
    assert REFUSED[sql] in err and err.count("\n") == 1, err   # one line
    assert sha256(store) == before and sorted(project.rglob("*")) == files
    assert list(tmp_path.iterdir()) == []                       # nothing written outside either


def test_reads_of_every_kind_still_work(project, capsys, monkeypatch):
    for sql, first_line in [("SELECT count(*) AS k FROM estimates", '"k"'),
                            ("FROM study SELECT name", '"name"'),
                            ("WITH m AS (SELECT * FROM performance) SELECT count(*) > 0 AS ok FROM m", '"ok"'),
                            ("DESCRIBE estimates", '"column_name"'), ("SHOW TABLES", '"name"'),
                            ("SUMMARIZE estimates", '"column_name"'), ("EXPLAIN SELECT 1", '"explain_key"'),
                            ("PIVOT performance ON measure IN ('bias') USING first(value)", '"scenario"')]:
        code, out, err = cli_here(capsys, monkeypatch, project, "query", "study.yaml", sql)
        assert code == 0 and out.splitlines()[0].startswith(first_line), (sql, out, err)


@pytest.mark.snakemake
def test_the_real_command_refuses_a_write_in_one_line(project, tmp_path):
    store = project / "results/tiny/store.duckdb"
    before = sha256(store)
    proc = run_cli("query", "study.yaml", f"COPY estimates TO '{tmp_path}/out.csv'", cwd=project)
    assert proc.returncode == 2 and proc.stdout == ""
    assert proc.stderr.splitlines()[-1] == (
        "estbench: `estbench query` only reads the store: it runs one SELECT (also WITH, FROM, DESCRIBE, "
        "SHOW, SUMMARIZE, PIVOT) or EXPLAIN, not a statement of type COPY")
    assert "Traceback" not in proc.stderr and sha256(store) == before and not (tmp_path / "out.csv").exists()
