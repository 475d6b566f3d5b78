"""``estbench run``: one guarded, resumable Snakemake run with live progress.

- A study is run by one ``estbench run`` at a time per folder: an exclusive
  ``flock`` on ``results/<study>/.run.lock`` refuses a second one. The kernel
  drops the lock when its holder dies, even by SIGKILL, so no stale lock of
  ours can block a later run; a run that ends (cleanly or not) removes the file.
- Snakemake's own locks do go stale when it is killed. They are cleared (by
  ``snakemake --unlock``) only when no other estbench run is alive in this
  folder: every run holds a shared ``flock`` on ``.snakemake/estbench.gate``,
  and clearing needs it exclusively.
- Before Snakemake starts, existing shards get a quick check (footer, metadata,
  row count); a bad one is removed, with its job's record, so it is recomputed.
  Ingest checks every page's checksum; if it removes a corrupt shard, the run
  goes round once more.
"""

from __future__ import annotations

import fcntl
import os
import shutil
import subprocess
import sys
import threading
import time
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from estbench.analyse.store import check_store
from estbench.app.status import ShardPlan, pending_jobs, shard_plans
from estbench.core.bundled import SNAKEFILE
from estbench.core.errors import UserError
from estbench.simulate.shard import DAMAGED
from estbench.study import jobs
from estbench.study.model import Study


def _is_at(fh, path: Path) -> bool:
    """True if the open file *fh* is the file now at *path* (not one unlinked since)."""
    try:
        now = os.stat(path)
    except FileNotFoundError:
        return False
    mine = os.fstat(fh.fileno())
    return (mine.st_dev, mine.st_ino) == (now.st_dev, now.st_ino)


@contextmanager
def study_lock(study: Study, workdir: Path):
    """Hold the study's run lock; ``UserError`` if another run holds it.

    The holder removes the lock file when it leaves, while still holding the
    lock. A starter that opened the file before that removal gets its lock on a
    file no longer at the path, so after locking it checks that the path still
    names the file it locked, and starts again if not.
    """
    lock = study.layout(workdir).run_lock
    lock.parent.mkdir(parents=True, exist_ok=True)
    while True:
        fh = open(lock, "a+")
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            fh.seek(0)
            holder = fh.read().strip() or "unknown"
            fh.close()
            raise UserError(f"another `estbench run` of study {study.name!r} is in progress in this folder "
                            f"(pid {holder}); wait for it to finish or stop it first") from None
        if _is_at(fh, lock):
            break
        fh.close()
    try:
        fh.seek(0)
        fh.truncate()
        fh.write(str(os.getpid()))
        fh.flush()
        yield
    finally:
        lock.unlink(missing_ok=True)
        fh.close()


@contextmanager
def folder_gate(workdir: Path):
    """Shared lock marking 'an estbench run is alive in this folder'."""
    state = workdir / ".snakemake"
    state.mkdir(exist_ok=True)
    fh = open(state / "estbench.gate", "a+")
    fcntl.flock(fh, fcntl.LOCK_SH)
    try:
        yield fh
    finally:
        fh.close()


def clear_stale_snakemake_locks(gate, snakefile_args: list[str], workdir: Path) -> bool:
    """Remove Snakemake's locks if no other estbench run is alive here; True if removed."""
    locks = workdir / ".snakemake" / "locks"
    if not locks.is_dir() or not any(locks.iterdir()):
        return False
    try:
        fcntl.flock(gate, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return False  # another estbench run in this folder: its locks are live
    try:
        proc = subprocess.run([*snakefile_args, "--unlock"], cwd=workdir, capture_output=True, text=True)
    finally:
        fcntl.flock(gate, fcntl.LOCK_SH)
    if proc.returncode != 0:
        said = (proc.stderr or proc.stdout).strip().splitlines()
        raise UserError(f"Snakemake could not clear the locks a killed run left in {locks}: "
                        f"{said[-1] if said else 'no message'}; remove that folder by hand if no run is alive")
    return True


def remove_bad_shards(study: Study, workdir: Path, plans: list[ShardPlan]) -> list[str]:
    """Delete every damaged shard (the quick check of ``shard_plans``), and the record
    of each job with a damaged or missing shard, so the job runs again."""
    layout, removed, job_of = study.layout(workdir), [], jobs.job_of_piece(study)
    for plan in plans:
        if plan.missing or plan.damaged:
            layout.job_record(*job_of[(plan.scenario, plan.first_block)]).unlink(missing_ok=True)
        if plan.damaged:
            plan.path.unlink(missing_ok=True)
            removed.append(f"{plan.path.relative_to(workdir)} {plan.reason.removeprefix(DAMAGED)}")
    return removed


@dataclass
class Progress:
    """Counts the jobs this run has finished (their records) and prints one status line."""

    study: Study
    workdir: Path
    pending: dict          #: (scenario, first block) -> replicates, from ``pending_jobs``
    stream: object = sys.stderr

    def __post_init__(self):
        layout = self.study.layout(self.workdir)
        self.todo = {layout.job_record(s, b): reps
                     for (s, b), reps in self.pending.items()}
        self.total_reps = sum(self.todo.values())
        self.start = time.time()
        self._stop = threading.Event()

    def _done(self) -> tuple[int, int]:
        jobs_done = reps = 0
        for path, n in self.todo.items():
            try:
                fresh = path.stat().st_mtime >= self.start - 1
            except FileNotFoundError:
                continue
            if fresh:
                jobs_done += 1
                reps += n
        return jobs_done, reps

    def line(self) -> str:
        done, reps = self._done()
        elapsed = time.time() - self.start
        left = len(self.todo) - done
        if left == 0:
            eta = "simulation done; ingest and report"
        elif done > 0:
            eta = f"about {_duration(elapsed / reps * (self.total_reps - reps))} left"
        else:
            eta = "estimating time left"
        return (f"jobs {done}/{len(self.todo)} · replicates {reps:,}/{self.total_reps:,} "
                f"· {_duration(elapsed)} elapsed · {eta}")

    def _loop(self, interval: float, tty: bool):
        last = ""
        while not self._stop.wait(interval):
            text = self.line()
            if tty:
                self.stream.write("\r\033[K" + text)
                self.stream.flush()
            elif text != last:
                self.stream.write(text + "\n")
                self.stream.flush()
            last = text

    @contextmanager
    def shown(self):
        tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        thread = threading.Thread(target=self._loop, args=(0.5 if tty else 10.0, tty), daemon=True)
        thread.start()
        try:
            yield
        finally:
            self._stop.set()
            thread.join()
            self.stream.write(("\r\033[K" if tty else "") + self.line() + "\n")
            self.stream.flush()


def _duration(seconds: float) -> str:
    seconds = int(round(seconds))
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    return f"{h}h{m:02d}m" if h else (f"{m}m{s:02d}s" if m else f"{s}s")


def snakemake_base(study_file: Path, workdir: Path) -> list[str]:
    return [sys.executable, "-m", "snakemake", "--snakefile", str(SNAKEFILE),
            "--directory", str(workdir), "--configfile", str(study_file.resolve())]


def snakemake_command(study_file: Path, workdir: Path, cores: int, extra: list[str]) -> list[str]:
    """The Snakemake call behind ``estbench run``."""
    return [*snakemake_base(study_file, workdir), "--cores", str(cores), "--scheduler", "greedy",
            "--rerun-incomplete", *extra]


def run_study(study: Study, study_file: Path, workdir: Path, cores: int, extra: list[str],
              verbose: bool = False) -> int:
    """Run (or resume) the study; returns Snakemake's exit status."""
    workdir = workdir.resolve()
    with study_lock(study, workdir), folder_gate(workdir) as gate:
        if clear_stale_snakemake_locks(gate, snakemake_base(study_file, workdir), workdir):
            print("estbench: cleared Snakemake's locks left by a run that was killed", file=sys.stderr)
        plans = shard_plans(study, workdir)
        for line in remove_bad_shards(study, workdir, plans):
            print(f"estbench: removed a damaged shard, to be recomputed: {line}", file=sys.stderr)
        check_store(study.layout(workdir).store)  # a damaged store: say so before Snakemake starts
        marker = study.layout(workdir).recompute_marker
        for attempt in (1, 2):
            marker.unlink(missing_ok=True)
            if attempt == 2:  # ingest removed damaged shards: look again
                plans = shard_plans(study, workdir)
            extra_args = [*_force_ingest_if_records_missing(study, workdir), *extra]
            started = time.time()
            code, log = _call(snakemake_command(study_file, workdir, cores, extra_args), study, workdir,
                              pending_jobs(study, workdir, plans), verbose)
            if code == 0:
                return 0
            if marker.exists() and attempt == 1:
                print("estbench: ingest found damaged shards (listed in "
                      f"{marker.relative_to(workdir)}); recomputing them", file=sys.stderr)
                continue
            if log is not None:
                tail = log.read_text(errors="replace").splitlines()[-25:]
                print("\n".join(["estbench: Snakemake stopped with an error; the end of its log:", *tail,
                                 f"estbench: full log: {log.relative_to(workdir)}"]), file=sys.stderr)
            for line in failed_step_lines(study, workdir, started):
                print(f"estbench: {line}", file=sys.stderr)
            return code
    return code


#: Free bytes below which a failed run blames a full disk (a shard or a log needs more).
_NEARLY_FULL = 1 << 20


def failed_step_lines(study: Study, workdir: Path, since: float) -> list[str]:
    """What the steps that failed in a run started at *since* said: estbench's own lines
    and Python's fatal errors from the logs written since, and each job that left no
    record and no word. Snakemake's log shows only that a job failed."""
    layout, lines = study.layout(workdir), []
    for log in sorted(layout.logs.rglob("*.log")):
        try:
            if log.name.startswith("snakemake-") or log.stat().st_mtime < since - 1:
                continue
            text = log.read_text(errors="replace").splitlines()
        except OSError:
            continue
        where = log.relative_to(workdir)
        said = [line.removeprefix("estbench: ") for line in text
                if line.startswith(("estbench: ", "Fatal Python error: "))]
        lines += [f"{where}: {line}" for line in said]
        if not text and log.parent.parent.name == "jobs" and not layout.job_record(
                log.parent.name, log.stem).exists():
            lines.append(f"{where}: the job ended without a word: its process was ended (by an estimator "
                         f"calling os._exit, or by the system, e.g. out of memory) or its log could not "
                         f"be written (a full disk)")
    free = shutil.disk_usage(layout.logs if layout.logs.exists() else workdir).free
    if free < _NEARLY_FULL:
        lines.insert(0, f"the disk holding {layout.logs.parent.relative_to(workdir)} is full ({free:,} bytes "
                        f"free): free some space and run the same command again; finished shards are kept")
    return lines


def _force_ingest_if_records_missing(study: Study, workdir: Path) -> list[str]:
    """Snakemake does not rebuild a missing intermediate file while the files made
    from it are present and newer, so a removed job record would never come back:
    when the store exists and a record is missing, force the ingest rule, which needs it."""
    layout = study.layout(workdir)
    if layout.store.exists() and any(not p.exists() for p in jobs.job_record_paths(study, layout)):
        return ["--forcerun", "ingest"]
    return []


def _call(cmd: list[str], study: Study, workdir: Path, pending: dict, verbose: bool) -> tuple[int, Path | None]:
    """Run Snakemake: with its output on the terminal, or into a log under a progress line."""
    if verbose:
        return subprocess.call(cmd, cwd=workdir), None
    log = study.layout(workdir).snakemake_log(time.strftime('%Y%m%dT%H%M%S'))
    log.parent.mkdir(parents=True, exist_ok=True)
    with open(log, "w") as fh, Progress(study, workdir, pending).shown():
        code = subprocess.call(cmd, cwd=workdir, stdout=fh, stderr=subprocess.STDOUT)
    return code, log
