"""Shards: bit-identical whatever the grouping, paired across estimators, errors as data."""

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from estbench.core.hashing import code_hash
from estbench.study import jobs
from estbench.simulate.dgms import build_dgm
from estbench.simulate.estimator import per_replicate
from estbench.simulate.seeding import block_generator
from estbench.simulate.job import compute_shard, run_shard
from estbench.simulate.shard import read_metadata
from estbench.study.load import study_from_mapping

from conftest import tiny_study, write_study


def _study(tmp_path, **overrides):
    if "estimators" in overrides:
        overrides.setdefault("reference", next(iter(overrides["estimators"])))
    raw = tiny_study(**overrides)
    return study_from_mapping(raw, source=write_study(tmp_path, raw))


def _estimates_by_grouping(study, scenario, estimator):
    tables = [compute_shard(jobs.shard_spec(study, scenario, estimator, b), study.search_dirs)
              for b in study.job_first_blocks()]
    return pa.concat_tables(tables)


@pytest.mark.parametrize("blocks_per_job", [1, 3, 6])
def test_estimates_identical_for_any_blocks_per_job(tmp_path, blocks_per_job):
    base = _study(tmp_path, blocks_per_job=6)
    other = _study(tmp_path, blocks_per_job=blocks_per_job)
    s = base.scenarios[1].key
    for est in ("mean", "median"):
        a = _estimates_by_grouping(base, s, est)
        b = _estimates_by_grouping(other, s, est)
        assert a.num_rows == b.num_rows == 60
        assert a.column("estimate").to_numpy().tobytes() == b.column("estimate").to_numpy().tobytes()
        assert a.column("rep").to_pylist() == list(range(60))


def test_adding_scenarios_and_estimators_changes_no_existing_spec(tmp_path):
    before = _study(tmp_path)
    grown = tiny_study(sample_sizes=[5, 20, 50])
    grown["dgms"]["heavy"] = {"distribution": "t", "params": {"df": 4}}
    grown["estimators"]["trim"] = {"function": "location:trimmed_mean", "target": "mean",
                                   "args": {"proportion": 0.2}}
    after = study_from_mapping(grown, source=write_study(tmp_path, grown, "grown.yaml"))
    for s in before.scenarios:
        for e in before.estimators:
            for b in before.job_first_blocks():
                assert jobs.shard_spec_json(before, s.key, e, b) == jobs.shard_spec_json(after, s.key, e, b)


def test_every_estimator_sees_the_same_datasets(tmp_path):
    (tmp_path / "probe.py").write_text(
        "def first(x):\n    return x[:, 0]\n\ndef last(x):\n    return x[:, -1]\n")
    study = _study(tmp_path, estimators={
        "first": {"function": "probe:first", "target": "mean"},
        "last": {"function": "probe:last", "target": "mean"}})
    s = study.scenarios[0]
    first = _estimates_by_grouping(study, s.key, "first").column("estimate").to_numpy()
    last = _estimates_by_grouping(study, s.key, "last").column("estimate").to_numpy()
    dgm = build_dgm(s.spec)
    data = np.concatenate([dgm.draw(block_generator(study.seed, s.spawn_key, b), 10, s.n)
                           for b in range(study.n_blocks)])
    np.testing.assert_array_equal(first, data[:, 0])
    np.testing.assert_array_equal(last, data[:, -1])


def test_failures_are_recorded_not_raised(tmp_path):
    (tmp_path / "flaky.py").write_text(
        "import numpy as np\n"
        "from estbench.simulate.estimator import per_replicate\n"
        "def always_fails(x):\n"
        "    if len(x) == 10:  # a real block, not the 3-replicate trial run of `check`\n"
        "        raise RuntimeError('singular fit')\n"
        "    return x.mean(axis=1)\n"
        "def nan_when_low(x):\n    m = x.mean(axis=1)\n    return np.where(m < 2, np.nan, m)\n"
        "@per_replicate\n"
        "def one_at_a_time(row):\n"
        "    if row[0] < 2:\n        raise ValueError('first reading below 2')\n"
        "    return float(row.mean())\n")
    study = _study(tmp_path, estimators={
        "bad": {"function": "flaky:always_fails", "target": "mean"},
        "nan": {"function": "flaky:nan_when_low", "target": "mean"},
        "loop": {"function": "flaky:one_at_a_time", "target": "mean"}})
    s = study.scenarios[0]
    bad = _estimates_by_grouping(study, s.key, "bad")
    assert set(bad.column("status").to_pylist()) == {"error"}
    assert bad.column("message")[0].as_py() == "RuntimeError: singular fit"
    nan = _estimates_by_grouping(study, s.key, "nan")
    est = nan.column("estimate").to_numpy(zero_copy_only=False)
    status = np.array(nan.column("status").to_pylist())
    assert np.array_equal(status == "nonfinite", np.isnan(est)) and 0 < (status == "nonfinite").sum() < 60
    loop = _estimates_by_grouping(study, s.key, "loop")
    dgm = build_dgm(s.spec)
    data = np.concatenate([dgm.draw(block_generator(study.seed, s.spawn_key, b), 10, s.n)
                           for b in range(study.n_blocks)])
    lstatus = np.array(loop.column("status").to_pylist())
    np.testing.assert_array_equal(lstatus == "error", data[:, 0] < 2)
    ok = lstatus == "ok"
    np.testing.assert_allclose(loop.column("estimate").to_numpy(zero_copy_only=False)[ok],
                               data[ok].mean(axis=1), rtol=1e-15)
    assert set(loop.column("message").filter(pa.array(~ok)).to_pylist()) == {"ValueError: first reading below 2"}


def test_wrong_output_length_marks_the_block(tmp_path):
    (tmp_path / "short.py").write_text("def short(x):\n    return x[:3, 0]\n")
    study = _study(tmp_path, estimators={"short": {"function": "short:short", "target": "mean"}})
    table = _estimates_by_grouping(study, study.scenarios[0].key, "short")
    assert set(table.column("status").to_pylist()) == {"error"}
    assert "expected (10,)" in table.column("message")[0].as_py()


def test_shard_file_is_atomic_and_carries_provenance(tmp_path):
    study = _study(tmp_path)
    s = study.scenarios[0]
    out = tmp_path / "out" / "0.parquet"
    spec = jobs.shard_spec(study, s.key, "mean", 0)
    run_shard(spec, study.search_dirs, out)
    assert [p.name for p in out.parent.iterdir()] == ["0.parquet"]  # no temp file left
    meta = read_metadata(out)
    assert meta["seed"] == "12345" and meta["scenario_spawn_key"] == str(s.spawn_key)
    assert meta["rows"] == 30 and meta["n_blocks"] == 3 and len(meta["code_hash"]) == 16
    assert set(meta["versions"]) >= {"estbench", "numpy", "scipy"} and meta["seconds"] > 0
    table = pq.read_table(out)
    assert table.column_names == ["scenario", "estimator", "block", "rep", "estimate", "se",
                                  "ci_low", "ci_high", "p_value", "status", "message"]
    assert table.column("se").null_count == 0  # location:mean gives an SE


def test_code_files_follow_same_folder_helpers(tmp_path):
    (tmp_path / "_shared_bits.py").write_text("def centre(x):\n    return x.mean(axis=1)\n")
    (tmp_path / "uses_helper.py").write_text("from _shared_bits import centre\n\n"
                                            "def est(x):\n    return centre(x)\n")
    from estbench.simulate import plugins
    files = plugins.code_files("uses_helper:est", [str(tmp_path)])
    assert [p.name for p in files] == ["uses_helper.py", "_shared_bits.py"]
    before = code_hash(files)
    (tmp_path / "_shared_bits.py").write_text("def centre(x):\n    return x.mean(axis=1) + 0\n")
    assert code_hash(files) != before


def test_per_replicate_time_limit_and_structured_data():
    import time

    from estbench.simulate.estimator import apply_to_block

    @per_replicate(time_limit=0.2)
    def slow_when_negative(row):
        if row["y"][0] < 0:
            time.sleep(5)
        return float(row["y"].mean() - row["x"].mean())

    data = {"x": np.zeros((4, 3)), "y": np.array([[1.0, 2, 3], [-1, 0, 0], [2, 2, 2], [-5, 1, 1]])}
    start = time.perf_counter()
    result = apply_to_block(slow_when_negative, data, 4, {})
    assert time.perf_counter() - start < 2  # two limits of 0.2 s, not two sleeps of 5 s
    assert result.status.tolist() == ["ok", "error", "ok", "error"]
    assert result.message[1] == "TimeLimitExceeded: replicate took longer than 0.2 s"
    np.testing.assert_array_equal(result.columns["estimate"][[0, 2]], [2.0, 2.0])


def _job_files(study, workdir, first_block=0):
    """Run the piece of scenario 0 at *first_block* through the engine, as a job does."""
    from estbench.simulate.job import run_piece, shards_of_piece
    piece = jobs.piece_spec(study, study.scenarios[0].key, first_block)
    outputs = shards_of_piece(study.layout(workdir), piece)
    return run_piece(piece, study.search_dirs, outputs), outputs


def _fingerprint(path):
    return path.stat().st_mtime_ns, path.read_bytes()


def test_a_job_writes_one_shard_per_estimator_from_one_draw(tmp_path):
    study = _study(tmp_path)
    record, outputs = _job_files(study, tmp_path)
    assert set(outputs) == {"mean", "median"}
    assert {s["action"] for s in record["shards"].values()} == {"computed"}
    s = study.scenarios[0]
    for name, path in outputs.items():  # the same rows as the shard computed on its own
        alone = compute_shard(jobs.shard_spec(study, s.key, name, 0), study.search_dirs)
        assert pq.read_table(path).equals(alone)
        assert read_metadata(path)["rows"] == 30


def test_adding_an_estimator_computes_only_its_shard(tmp_path):
    study = _study(tmp_path)
    _, outputs = _job_files(study, tmp_path)
    before = {name: _fingerprint(path) for name, path in outputs.items()}
    grown = tiny_study()
    grown["estimators"]["trim"] = {"function": "location:trimmed_mean", "target": "mean",
                                   "args": {"proportion": 0.2}}
    record, outputs = _job_files(study_from_mapping(grown, source=tmp_path / "study.yaml"), tmp_path)
    actions = {name: (s["action"], s["reason"]) for name, s in record["shards"].items()}
    assert actions == {"mean": ("kept", "up to date"), "median": ("kept", "up to date"),
                       "trim": ("computed", "missing")}
    assert {name: _fingerprint(outputs[name]) for name in before} == before


def test_more_replicates_keep_the_blocks_a_shard_has(tmp_path):
    study = _study(tmp_path, replicates=50, blocks_per_job=6)  # 5 blocks, one job
    _, outputs = _job_files(study, tmp_path)
    grown = _study(tmp_path, replicates=60, blocks_per_job=6)  # the job now has 6 blocks
    record, outputs = _job_files(grown, tmp_path)
    assert record["shards"]["mean"]["reason"] == "more blocks"
    assert record["shards"]["mean"]["reused_blocks"] == 5
    s = grown.scenarios[0]
    fresh = compute_shard(jobs.shard_spec(grown, s.key, "mean", 0), grown.search_dirs)
    assert pq.read_table(outputs["mean"]).equals(fresh)  # identical to computing all 6 afresh


def test_shard_state_names_why_a_shard_is_recomputed(tmp_path):
    from estbench.simulate.shard import shard_state
    study = _study(tmp_path)
    _, outputs = _job_files(study, tmp_path)
    spec = jobs.shard_spec(study, study.scenarios[0].key, "mean", 0)
    from estbench.simulate import plugins
    code = code_hash(plugins.code_files("location:mean", study.search_dirs))
    assert shard_state(outputs["mean"], spec, code).current
    assert shard_state(outputs["mean"], spec, "0" * 16).reason == "estimator code changed"
    other = _study(tmp_path, level=0.9)  # location:mean takes the level: its numbers change
    other_spec = jobs.shard_spec(other, other.scenarios[0].key, "mean", 0)
    assert shard_state(outputs["mean"], other_spec, code).reason == "settings changed"
    assert shard_state(tmp_path / "none.parquet", spec, code).reason == "missing"
    outputs["mean"].write_bytes(outputs["mean"].read_bytes()[:-40])
    assert shard_state(outputs["mean"], spec, code).reason.startswith("damaged: unreadable")


def test_shards_stream_in_row_groups(tmp_path):
    from estbench.simulate.shard import ROW_GROUP_ROWS
    study = _study(tmp_path, replicates=150_000, block_size=10_000, blocks_per_job=15,
                   sample_sizes=[2])
    _, outputs = _job_files(study, tmp_path)
    handle = pq.ParquetFile(outputs["mean"])
    assert handle.metadata.num_rows == 150_000
    # Written a row group at a time: the job never held the whole shard at once.
    assert handle.num_row_groups == -(-150_000 // ROW_GROUP_ROWS) == 3


def test_auto_job_size_follows_the_data_drawn_not_the_estimators(tmp_path):
    from estbench.study.model import AUTO_VALUES_PER_JOB
    study = _study(tmp_path, blocks_per_job="auto", replicates=10**6, block_size=1000,
                   sample_sizes=[10, 1000])
    small, large = study.scenarios[0].key, study.scenarios[1].key
    assert study.job_blocks(large) == AUTO_VALUES_PER_JOB // (1000 * 1000) == 50
    assert study.job_blocks(small) == AUTO_VALUES_PER_JOB // (1000 * 10) == 5000
    assert study.job_first_blocks(large) == list(range(0, 1000, 50))
    assert study.job_first_blocks(small) == [0]  # 1000 blocks, fewer than one job's worth
    more = _study(tmp_path, blocks_per_job="auto", replicates=2 * 10**6, block_size=1000,
                  sample_sizes=[10, 1000], estimators={"sd": {"function": "scale:sd", "target": "sd"}})
    assert more.job_first_blocks(large)[:20] == study.job_first_blocks(large)


def test_string_columns_match_pyarrows_own_conversion():
    from estbench.simulate.shard import _strings
    values = ["ok", None, "error", "ValueError: ratio µ/σ undefined", None, ""]
    built = _strings(values)
    built.validate(full=True)
    assert built.equals(pa.array(values, pa.string()))  # reference: pyarrow's converter
    assert _strings([None] * 3).null_count == 3 and _strings([]).equals(pa.array([], pa.string()))
