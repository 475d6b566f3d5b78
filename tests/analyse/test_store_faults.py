"""A damaged store (cut short, its header overwritten, not a database at all): every
verb that reads it says which file and what to do, exits 2 without a traceback, and
changes nothing; deleting it and running again rebuilds it from the kept shards,
recomputing none."""

import pytest
from conftest import cli_here, copy_project, run_cli, sha256, shard_mtimes

STORE = "results/tiny/store.duckdb"


def _cut_to_half(data: bytes) -> bytes:
    return data[: len(data) // 2]


def _garbage_header(data: bytes) -> bytes:
    return b"plot yields " * 400 + data[4800:]


#: How a store gets damaged -> (the damage, words DuckDB or estbench use for it).
DAMAGE = {
    "cut to half": (_cut_to_half, "shorter than the"),
    "header overwritten": (_garbage_header, "not a valid DuckDB database file"),
    "a text file": (lambda data: b"scenario,estimate\n1,2\n", "not a valid DuckDB database file"),
    "empty": (lambda data: b"", "not a valid DuckDB database file"),
}

#: Verbs that read the store, run in this process (the same entry point as the command).
VERBS = {
    "report": ("report", "study.yaml"),
    "status": ("status", "study.yaml"),
    "query": ("query", "study.yaml", "SELECT count(*) FROM estimates"),
    "run": ("run", "study.yaml", "--cores", "1"),
}

OUTPUTS = ("performance.csv", "checks.csv", "report.html")


@pytest.fixture
def damaged(finished_tiny, tmp_path, request):
    """A copy of the finished project whose store has the damage named by the test's `damage`."""
    cwd = copy_project(finished_tiny, tmp_path)
    store = cwd / STORE
    store.write_bytes(DAMAGE[request.node.callspec.params["damage"]][0](store.read_bytes()))
    return cwd


def _expected(damage: str) -> list[str]:
    return [f"estbench: the store {STORE} is damaged (", DAMAGE[damage][1],
            "); delete it and run `estbench run` again: the shards are kept"]


@pytest.mark.parametrize("verb", sorted(VERBS))
@pytest.mark.parametrize("damage", sorted(DAMAGE))
def test_a_damaged_store_is_named_with_what_to_do(damaged, damage, verb, capsys, monkeypatch):
    before = {p: sha256(damaged / "results/tiny" / p) for p in (*OUTPUTS, "store.duckdb")}
    shards = shard_mtimes(damaged)
    code, out, err = cli_here(capsys, monkeypatch, damaged, *VERBS[verb])
    assert code == 2, out + err
    assert all(words in err for words in _expected(damage)), err
    assert err.count("\n") == 1 and "estbench: done" not in out
    assert {p: sha256(damaged / "results/tiny" / p) for p in before} == before   # nothing rewritten
    assert shard_mtimes(damaged) == shards


@pytest.mark.parametrize("damage", ["cut to half", "header overwritten"])
def test_ingest_refuses_a_damaged_store_too(damaged, damage, capsys, monkeypatch):
    """The workflow's ingest step (`python -m estbench.analyse.store`), run on its own."""
    from estbench.analyse.store import main
    monkeypatch.chdir(damaged)
    before = sha256(damaged / STORE)
    assert main(["--study", "study.yaml", "--store", STORE]) == 2
    err = capsys.readouterr().err
    start, _, end = _expected(damage)       # DuckDB words the damage its own way here
    assert start in err and end in err, err
    assert sha256(damaged / STORE) == before


@pytest.mark.snakemake
@pytest.mark.parametrize("damage", ["header overwritten"])
def test_delete_the_damaged_store_and_run_again_recomputes_no_shard(damaged, damage, finished_tiny):
    refused = run_cli("run", "study.yaml", "--cores", "2", cwd=damaged)
    assert refused.returncode == 2 and all(w in refused.stderr for w in _expected(damage)), refused.stderr
    assert "Traceback" not in refused.stdout + refused.stderr
    shards = shard_mtimes(damaged)
    (damaged / STORE).unlink()
    rerun = run_cli("run", "study.yaml", "--cores", "2", cwd=damaged)
    assert rerun.returncode == 0, rerun.stdout + rerun.stderr
    assert shard_mtimes(damaged) == shards
    for name in ("performance.csv", "checks.csv"):
        assert (damaged / "results/tiny" / name).read_bytes() == (finished_tiny / "results/tiny" / name).read_bytes()
