"""Estimator faults as a user meets them: in the check's trial run and in a real run.

An estimator that raises, returns the wrong shape, NaN, inf or text, prints, or calls
``sys.exit`` is recorded replicate by replicate (status and message) and the run goes
on. One that ends its process (``os._exit``, a segmentation fault) or hangs stops its
job: the run fails, or is stopped with Ctrl-C, and every shard finished before is
kept as it was, the store too. In the check's trial run each of them is a clear
problem line, never the end of estbench itself.

The counts are known by construction: tiny_study runs 2 scenarios (n = 5, 20) of
6 seed blocks of 10 replicates; the check's trial run draws 3 replicates.
"""

import csv
import io
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml
from conftest import (
    copy_project,
    run_cli,
    sha256,
    shard_mtimes,
    tiny_study,
    write_study,
)
from estbench.core.errors import (
    EXIT_FAILED_REPLICATES,
    EXIT_INTERRUPTED,
    EXIT_RUN_FAILED,
)
from estbench.simulate.shard import verify_shard

#: A field survey's plot estimators, each with one fault; real seed blocks have 10
#: replicates, the check's trial run 3, so the faults pass the check and strike in the run.
RECORDED_MODULE = '''
import numpy as np

from estbench.simulate.estimator import per_replicate


def _real_small(x):
    return x.shape == (10, 5)


def raises(x):
    if _real_small(x):
        raise ValueError("plot weights missing")
    return x.mean(axis=1)


def wrong_shape(x):
    estimate = x.mean(axis=1)
    return estimate[:-1] if _real_small(x) else estimate


def nonfinite(x):
    estimate = x.mean(axis=1)
    if x.shape[0] == 10:
        estimate[0], estimate[1] = np.nan, np.inf
    return estimate


def text(x):
    return "about two" if _real_small(x) else x.mean(axis=1)


def chatty(x):
    print("scenario,estimator,rep,estimate")      # looks like CSV: must not reach a CSV on stdout
    print("chatter from the plot estimator")
    return x.mean(axis=1)


def quits(x):
    if _real_small(x):
        raise SystemExit(3)
    return x.mean(axis=1)


calls = 0


@per_replicate
def flaky(row):
    """Fails on every third replicate a job hands it: 10 of each job's 30."""
    global calls
    calls += 1
    if calls % 3 == 0:
        raise RuntimeError("plot flooded")
    return float(row.mean())
'''

#: estimator -> (failed replicates at n = 5, at n = 20, status, message of the failed ones)
RECORDED = {
    "raises": (60, 0, "error", "ValueError: plot weights missing"),
    "wrong_shape": (60, 0, "error",
                    "ContractError: 'estimate' has shape (9,); expected (10,), one value per replicate"),
    "nonfinite": (12, 12, "nonfinite", "estimate is not finite"),
    "text": (60, 0, "error", "ValueError: could not convert string to float: 'about two'"),
    "chatty": (0, 0, None, None),
    "quits": (60, 0, "error", "SystemExit: 3"),
    "flaky": (20, 20, "error", "RuntimeError: plot flooded"),
}

#: A plug-in whose estimator `crash` does BODY when WHEN holds for its block x.
CRASH_MODULE = '''
import ctypes
import os
import signal
import sys
import time


def crash(x):
    if {when}:
        {body}
    return x.mean(axis=1)
'''

#: Faults of the process, not of a value: what the trial run (3 replicates) says.
TRIAL_FAULTS = {
    "raises": ("raise ValueError('no plots')", "ValueError: no plots"),
    "sys.exit": ("sys.exit(3)", "SystemExit: 3"),
    "os._exit": ("os._exit(1)", "ProcessEnded: the estimator ended the Python process (exit status 1)"),
    "segfault (ctypes)": ("ctypes.string_at(0)",
                          "ProcessEnded: the estimator crashed the Python process (signal SIGSEGV"),
    "SIGSEGV sent to itself": ("os.kill(os.getpid(), signal.SIGSEGV)", "(signal SIGSEGV"),
    "abort": ("os.abort()", "(signal SIGABRT"),
}

#: Faults that end a job's process in a real run: what `estbench run` says of the job.
RUN_CRASHES = {
    "os._exit": ("os._exit(1)", "the job ended without a word: its process was ended"),
    "segfault (ctypes)": ("ctypes.string_at(0)", "Fatal Python error: Segmentation fault"),
}

HANG = "open('hanging', 'a').write(f'{os.getpid()} '); time.sleep(600)"
SMALL_REAL_BLOCK = "x.shape == (10, 5)"


def _add_estimators(cwd: Path, module: str, text: str, names) -> Path:
    """Write plug-in *module* beside the study and add its *names* to the study."""
    (cwd / f"{module}.py").write_text(text)
    study = yaml.safe_load((cwd / "study.yaml").read_text())
    for name in names:
        study["estimators"][name] = {"function": f"{module}:{name}", "target": "mean"}
    return write_study(cwd, study)


def _ctrl_c_as_in_a_terminal() -> None:
    """In the child: Ctrl-C's default disposition. A test run started in the background
    by a non-interactive shell inherits SIGINT ignored, and Python keeps it so."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def _crash_project(finished: Path, cwd: Path, body: str, when: str = SMALL_REAL_BLOCK) -> Path:
    copy_project(finished, cwd)
    return _add_estimators(cwd, "plot_crash", CRASH_MODULE.format(when=when, body=body), ["crash"])


def _no_traceback(proc) -> None:
    assert "Traceback" not in proc.stdout + proc.stderr, proc.stdout + proc.stderr


def _untouched(cwd: Path, mtimes: dict, store_digest: str) -> None:
    """The finished shards (other estimators') and the store are as they were."""
    now = shard_mtimes(cwd)
    assert {k: now.get(k) for k in mtimes} == mtimes, "a finished shard was rewritten or lost"
    assert sha256(cwd / "results/tiny/store.duckdb") == store_digest, "the store changed"
    assert not [p for p in (cwd / "results").rglob("*.tmp-*")], "a temporary file was left"


def _all_gone(pids, wait: float = 10) -> bool:
    """Have the processes *pids* ended (zombies count as ended) within *wait* seconds?"""
    def alive(pid):
        try:
            return Path(f"/proc/{pid}/stat").read_text().split(") ")[1][0] != "Z"
        except (FileNotFoundError, IndexError):
            return False
    pids, deadline = list(pids), time.monotonic() + wait
    while any(map(alive, pids)) and time.monotonic() < deadline:
        time.sleep(0.1)
    return not any(map(alive, pids))


def _performance(cwd: Path) -> list[dict]:
    return list(csv.DictReader(open(cwd / "results/tiny/performance.csv")))


# --- faults recorded per replicate: one real run with all of them -------------------------

@pytest.fixture(scope="module")
def recorded_run(finished_tiny, tmp_path_factory):
    cwd = copy_project(finished_tiny, tmp_path_factory.mktemp("recorded"))
    before = shard_mtimes(cwd)
    path = _add_estimators(cwd, "plot_faults", RECORDED_MODULE, RECORDED)
    proc = run_cli("run", path, "--cores", "2", cwd=cwd)
    return cwd, path, proc, before


@pytest.mark.snakemake
def test_recorded_faults_finish_the_run_and_keep_the_other_shards(recorded_run):
    cwd, path, proc, before = recorded_run
    # exit 3: the run completed, but some estimators failed on every replicate of a scenario
    assert proc.returncode == EXIT_FAILED_REPLICATES, proc.stdout + proc.stderr
    assert "raises failed on every replicate of normal, n = 5" in proc.stdout + proc.stderr
    _no_traceback(proc)
    assert "chatter" not in proc.stdout               # the trial run's print went to stderr
    now = shard_mtimes(cwd)
    assert {k: now[k] for k in before} == before      # mean and median were not recomputed
    assert len(now) == 2 * 2 * (2 + len(RECORDED))    # scenarios x jobs x estimators
    for shard in now:
        verify_shard(cwd / shard)
    status = run_cli("status", path, cwd=cwd, check=True).stdout
    for name, (small, large, _, _) in RECORDED.items():
        assert f"  {name}: 120 replicates in 2 scenario(s), {small + large} failed" in status


@pytest.mark.snakemake
@pytest.mark.parametrize("name", sorted(RECORDED))
def test_each_recorded_fault_has_its_status_message_and_count(recorded_run, name):
    cwd, path, _, _ = recorded_run
    small, large, status, message = RECORDED[name]
    rows = run_cli("query", path, "SELECT s.n, e.status, e.message, count(*) AS k FROM estimates e "
                   f"JOIN scenarios s USING (scenario) WHERE e.estimator = '{name}' AND e.status <> 'ok' "
                   "GROUP BY ALL ORDER BY ALL", cwd=cwd, check=True).stdout
    expected = "".join(f'{n},"{status}","{message}",{k}\n' for n, k in ((5, small), (20, large)) if k)
    assert rows == '"n","status","message","k"\n' + expected
    # performance.csv counts them wherever some replicates succeeded
    bias = {int(r["n"]): r for r in _performance(cwd) if r["estimator"] == name and r["measure"] == "bias"}
    for n, failed in ((5, small), (20, large)):
        if failed < 60:
            assert (int(bias[n]["n_ok"]), int(bias[n]["n_failed"])) == (60 - failed, failed)
        else:
            assert n not in bias    # nothing to measure: the run summary warns instead


@pytest.mark.snakemake
def test_an_estimator_printing_does_not_corrupt_the_query_output(recorded_run):
    cwd, path, _, _ = recorded_run
    proc = run_cli("query", path, "SELECT estimator, count(*) AS k FROM estimates "
                   "WHERE estimator IN ('chatty', 'mean') GROUP BY ALL ORDER BY ALL", cwd=cwd, check=True)
    assert proc.stdout == '"estimator","k"\n"chatty",120\n"mean",120\n'
    assert "chatter from the plot estimator" in proc.stderr    # the check's trial run still speaks
    assert list(csv.reader(io.StringIO(proc.stdout)))[1:] == [["chatty", "120"], ["mean", "120"]]


# --- faults that end the job's process ------------------------------------------------------

@pytest.mark.snakemake
@pytest.mark.parametrize("case", sorted(RUN_CRASHES))
def test_a_crashing_estimator_fails_the_run_and_loses_no_finished_work(finished_tiny, tmp_path, case):
    body, said = RUN_CRASHES[case]
    path = _crash_project(finished_tiny, tmp_path, body)
    before, store = shard_mtimes(tmp_path), sha256(tmp_path / "results/tiny/store.duckdb")
    performance = (tmp_path / "results/tiny/performance.csv").read_bytes()
    proc = run_cli("run", path, "--cores", "2", cwd=tmp_path)
    assert proc.returncode == EXIT_RUN_FAILED
    assert "Snakemake stopped with an error" in proc.stderr and said in proc.stderr, proc.stderr
    assert "results/tiny/logs/jobs/" in proc.stderr         # which job, and where its log is
    _no_traceback(proc)
    _untouched(tmp_path, before, store)
    assert (tmp_path / "results/tiny/performance.csv").read_bytes() == performance
    crashed = [p for p in shard_mtimes(tmp_path) if "/crash/" in p]
    small = run_cli("query", path, "SELECT scenario FROM scenarios WHERE n = 5", cwd=tmp_path,
                    check=True).stdout.splitlines()[1].strip('"')
    assert not [p for p in crashed if small in p]            # no shard of the crashed jobs
    for shard in crashed:                                    # those written are whole
        verify_shard(tmp_path / shard)


@pytest.mark.snakemake
def test_a_hanging_estimator_can_be_stopped_and_a_fixed_one_finishes(finished_tiny, tmp_path):
    """No time limit guards a batch estimator (``per_replicate(time_limit=...)`` is the only
    one, opt-in, for per-replicate estimators): Ctrl-C stops the run, and nothing is lost."""
    path = _crash_project(finished_tiny, tmp_path, HANG)
    before, store = shard_mtimes(tmp_path), sha256(tmp_path / "results/tiny/store.duckdb")
    run = subprocess.Popen([sys.executable, "-m", "estbench.app.cli", "run", str(path), "--cores", "2"],
                           cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                           start_new_session=True, preexec_fn=_ctrl_c_as_in_a_terminal)
    marker, deadline = tmp_path / "hanging", time.monotonic() + 120
    try:
        while not marker.exists() or len(marker.read_text().split()) < 2:  # both n = 5 jobs hang
            assert run.poll() is None and time.monotonic() < deadline, run.communicate()
            time.sleep(0.1)
        os.killpg(run.pid, signal.SIGINT)                    # Ctrl-C in the terminal
        out, err = run.communicate(timeout=60)
    finally:
        if run.poll() is None:
            os.killpg(run.pid, signal.SIGKILL)
            run.wait()
    assert run.returncode == EXIT_INTERRUPTED and "interrupted; run the same command again" in err, err
    assert "Traceback" not in out + err
    assert _all_gone(map(int, marker.read_text().split()))  # no job keeps hanging
    _untouched(tmp_path, before, store)

    (tmp_path / "plot_crash.py").write_text(CRASH_MODULE.format(when=SMALL_REAL_BLOCK, body="pass"))
    rerun = run_cli("run", path, "--cores", "2", cwd=tmp_path)
    assert rerun.returncode == 0, rerun.stdout + rerun.stderr
    now = shard_mtimes(tmp_path)
    assert {k: now[k] for k in before} == before            # mean and median still not recomputed
    assert len([p for p in now if "/crash/" in p]) == 4


# --- the same faults in the check's trial run: a problem line, never a dead estbench ---------

@pytest.mark.parametrize("case", sorted(TRIAL_FAULTS))
def test_a_fault_in_the_trial_run_is_a_clear_problem(tmp_path, case):
    body, said = TRIAL_FAULTS[case]
    write_study(tmp_path, tiny_study())
    path = _add_estimators(tmp_path, "plot_crash", CRASH_MODULE.format(when="True", body=body), ["crash"])
    proc = run_cli("check", path, cwd=tmp_path, timeout=120)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert "`estimators.crash.function`: a trial run on DGM 'normal' (n = 20) failed: " in proc.stderr
    assert said in proc.stderr, proc.stderr
    _no_traceback(proc)
    assert not (tmp_path / "results").exists()


def test_a_trial_run_that_hangs_stops_on_ctrl_c(tmp_path):
    write_study(tmp_path, tiny_study())
    path = _add_estimators(tmp_path, "plot_crash", CRASH_MODULE.format(when="True", body=HANG), ["crash"])
    check = subprocess.Popen([sys.executable, "-m", "estbench.app.cli", "check", str(path)], cwd=tmp_path,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True,
                                 preexec_fn=_ctrl_c_as_in_a_terminal)
    marker, deadline = tmp_path / "hanging", time.monotonic() + 60
    try:
        while not marker.exists():
            assert check.poll() is None and time.monotonic() < deadline, check.communicate()
            time.sleep(0.05)
        os.kill(check.pid, signal.SIGINT)                    # to estbench alone: its trial child goes too
        out, err = check.communicate(timeout=30)
    finally:
        if check.poll() is None:
            os.killpg(check.pid, signal.SIGKILL)
            check.wait()
    assert check.returncode == EXIT_INTERRUPTED and "interrupted" in err and "Traceback" not in out + err
    assert _all_gone(map(int, marker.read_text().split()))
