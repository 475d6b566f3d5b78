"""A results folder estbench may not write, and a full disk: one clear line, no
traceback, nothing half-written counted as done, and after the fix a run that ends
exactly where a run on a roomy disk ends.

As root, chmod does not stop writes: the read-only case then uses a read-only bind
mount, and the full disk a small tmpfs; where mounting is not permitted those tests
are skipped, saying so.
"""

import os
import subprocess
from contextlib import contextmanager
from pathlib import Path

import duckdb
import pytest
from conftest import (
    cli_here,
    copy_project,
    run_cli,
    sha256,
    shard_mtimes,
    tiny_study,
    write_study,
)
from estbench.analyse.store import main as ingest_main
from estbench.core.errors import EXIT_RUN_FAILED
from estbench.simulate.shard import verify_shard

RESULTS = "results/tiny"


def _mount(*args) -> None:
    done = subprocess.run(["mount", *map(str, args)], check=False, capture_output=True, text=True)
    if done.returncode != 0:
        pytest.skip(f"running as root, where chmod does not stop writes, and `mount {' '.join(map(str, args))}` "
                    f"is not permitted here: {done.stderr.strip()}")


@contextmanager
def read_only(folder: Path):
    """*folder* and everything under it made read-only for this process."""
    if os.geteuid() != 0:
        subprocess.run(["chmod", "-R", "a-w", str(folder)], check=True)
        try:
            yield
        finally:
            subprocess.run(["chmod", "-R", "u+w", str(folder)], check=True)
        return
    _mount("--bind", folder, folder)
    try:
        _mount("-o", "remount,ro,bind", folder)
        yield
    finally:
        subprocess.run(["umount", str(folder)], check=True)


@pytest.fixture
def small_disk(tmp_path):
    """An 8 MB tmpfs (root only) to fill."""
    if os.geteuid() != 0:
        pytest.skip("a full disk is made with a small tmpfs, which needs root")
    disk = tmp_path / "disk"
    disk.mkdir()
    _mount("-t", "tmpfs", "-o", "size=8M", "tmpfs", disk)
    try:
        yield disk
    finally:
        subprocess.run(["umount", str(disk)], check=True)


def _fill(disk: Path, leave: int) -> Path:
    """A filler file leaving *leave* bytes free on *disk*."""
    stat = os.statvfs(disk)
    filler = disk / "filler"
    filler.write_bytes(b"\0" * (stat.f_bavail * stat.f_frsize - leave))
    return filler


def _leftovers(cwd: Path) -> list[Path]:
    return [p for p in (cwd / "results").rglob("*") if ".tmp-" in p.name]


#: verb -> (arguments, exit status, words of its one line, or None when it needs no write)
READ_ONLY_VERBS = {
    "run": (("run", "study.yaml", "--cores", "1"), 2, "cannot use"),
    "report": (("report", "study.yaml"), 2, "cannot use"),
    "status": (("status", "study.yaml"), 0, None),
    "query": (("query", "study.yaml", "SELECT count(*) AS k FROM estimates"), 0, None),
}


@pytest.mark.parametrize("verb", sorted(READ_ONLY_VERBS))
def test_a_read_only_results_folder(finished_tiny, tmp_path, verb, capsys, monkeypatch):
    cwd = copy_project(finished_tiny, tmp_path / "project")
    args, status, words = READ_ONLY_VERBS[verb]
    before = {p: sha256(p) for p in (cwd / RESULTS).rglob("*") if p.is_file()}
    with read_only(cwd / RESULTS):
        code, out, err = cli_here(capsys, monkeypatch, cwd, *args)
    assert code == status, out + err
    if words:
        assert words in err and ("Read-only file system" in err or "Permission denied" in err), err
        assert "make them writable, then run the same command again" in err and err.count("\n") == 1
    assert {p: sha256(p) for p in (cwd / RESULTS).rglob("*") if p.is_file()} == before


@pytest.mark.snakemake
def test_a_disk_full_while_simulating_then_freed_finishes_as_on_a_roomy_disk(finished_tiny, small_disk):
    path = write_study(small_disk, tiny_study())
    filler = _fill(small_disk, 60_000)        # room for a few shards, not for all
    proc = run_cli("run", path, "--cores", "2", cwd=small_disk)
    assert proc.returncode == EXIT_RUN_FAILED, proc.stdout + proc.stderr
    assert f"the disk holding {RESULTS} is full" in proc.stderr, proc.stderr
    assert "Traceback" not in proc.stdout + proc.stderr
    assert not _leftovers(small_disk) and not (small_disk / RESULTS / "store.duckdb").exists()
    kept = shard_mtimes(small_disk)
    for shard in kept:                         # what was written is whole
        verify_shard(small_disk / shard)
    filler.unlink()
    rerun = run_cli("run", path, "--cores", "2", cwd=small_disk)
    assert rerun.returncode == 0, rerun.stdout + rerun.stderr
    now = shard_mtimes(small_disk)
    assert {k: now[k] for k in kept} == kept   # the shards finished before were kept
    for name in ("performance.csv", "checks.csv"):
        assert (small_disk / RESULTS / name).read_bytes() == (finished_tiny / RESULTS / name).read_bytes()


def test_a_disk_full_while_ingesting_leaves_no_store(finished_tiny, small_disk, capsys, monkeypatch):
    """The workflow's ingest step on its own: a first store that does not fit is removed,
    not left half-made; with room, the store matches one made on a roomy disk."""
    cwd = copy_project(finished_tiny, small_disk / "project")
    (cwd / RESULTS / "store.duckdb").unlink()
    filler = _fill(small_disk, 1_200_000)      # the shards are in; a 3.5 MB store does not fit
    monkeypatch.chdir(cwd)
    assert ingest_main(["--study", "study.yaml", "--store", f"{RESULTS}/store.duckdb"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("estbench: no space left on the disk") and err.count("\n") == 1, err
    assert sorted(p.name for p in (cwd / RESULTS).iterdir() if p.name.startswith("store")) == []
    filler.unlink()
    assert ingest_main(["--study", "study.yaml", "--store", f"{RESULTS}/store.duckdb"]) == 0
    code, _, err = cli_here(capsys, monkeypatch, cwd, "report", "study.yaml")
    assert code == 0, err
    sql = "SELECT * FROM performance ORDER BY ALL"
    tables = [duckdb.connect(str(folder / RESULTS / "store.duckdb"), read_only=True).sql(sql).fetchall()
              for folder in (cwd, finished_tiny)]
    assert tables[0] == tables[1]
    assert (cwd / RESULTS / "performance.csv").read_bytes() == (finished_tiny / RESULTS / "performance.csv").read_bytes()
