"""Jobs sized by work: small pieces packed into few jobs, shards never moved, numbers unchanged."""

import pyarrow.parquet as pq

from estbench.simulate.job import run_job, run_piece, shards_of_piece
from estbench.study import jobs
from estbench.study.load import study_from_mapping
from estbench.study.packing import (AUTO_VALUES_PER_JOB, AUTO_VALUES_PER_PACK, MIN_VALUES_PER_JOB, SPREAD_JOBS,
                                    Piece, pack, pack_target)

from conftest import tiny_study, write_study


def _wide(tmp_path, locations=40, **overrides):
    """A grid of many small scenarios: `locations` x 2 sample sizes, one block each."""
    raw = tiny_study(blocks_per_job="auto", replicates=20, block_size=20, sample_sizes=[5, 20],
                     dgms={"normal": {"distribution": "norm",
                                      "params": {"loc": [float(i) for i in range(locations)], "scale": 1.0}}})
    raw.update(overrides)
    return study_from_mapping(raw, source=write_study(tmp_path, raw))


def test_pack_shares_the_work_evenly_in_order():
    pieces = [Piece(f"{i:016x}", 0, 1, 10_000 if i % 2 else 50_000) for i in range(400)]
    total = sum(p.values for p in pieces)                      # 12,000,000 values
    target = pack_target(total)
    assert target == MIN_VALUES_PER_JOB == 2_000_000           # 12e6 / 8 is below the floor
    packed = pack(pieces, target)
    assert len(packed) == 6
    assert [p for job in packed for p in job.pieces] == pieces  # every piece once, in order
    assert max(job.values for job in packed) - min(job.values for job in packed) <= 60_000  # one or two pieces


def test_large_pieces_stay_jobs_of_their_own_and_deep_studies_get_few_large_jobs():
    pieces = [Piece("a" * 16, b, 50, 50_000_000) for b in range(0, 500, 50)]
    assert [len(job.pieces) for job in pack(pieces, AUTO_VALUES_PER_JOB)] == [1] * 10
    # a deep study of 40 full pieces (2e9 values): 8 jobs of 5 pieces, capped at AUTO_VALUES_PER_PACK
    deep = [Piece("b" * 16, b, 50, 50_000_000) for b in range(0, 2000, 50)]
    assert pack_target(2_000_000_000) == 250_000_000 <= AUTO_VALUES_PER_PACK
    assert [len(job.pieces) for job in pack(deep, pack_target(2_000_000_000))] == [5] * 8
    assert pack_target(10**12) == AUTO_VALUES_PER_PACK
    # a mid-sized study is spread over SPREAD_JOBS jobs
    mid = [Piece(f"{i:016x}", 0, 1, 1_000_000) for i in range(80)]
    assert len(pack(mid, pack_target(80_000_000))) == SPREAD_JOBS


def test_a_wide_grid_runs_as_few_jobs_and_an_integer_blocks_per_job_as_one_per_piece(tmp_path):
    wide = _wide(tmp_path)
    assert len(wide.pieces) == 80 and len(wide.jobs) == 1      # 80 x 20 x (5 or 20) values: one job
    fixed = _wide(tmp_path, blocks_per_job=1)
    assert len(fixed.jobs) == len(fixed.pieces) == 80
    assert all(len(job.pieces) == 1 for job in fixed.jobs)


def test_growing_a_study_never_moves_a_shard(tmp_path):
    """Piece boundaries depend on n, block size and blocks_per_job only."""
    study = _wide(tmp_path, replicates=200, block_size=20)
    before = set(jobs.shard_paths(study, study.layout(tmp_path)))
    more_reps = _wide(tmp_path, replicates=400, block_size=20)
    more_scenarios = _wide(tmp_path, locations=60, replicates=200, block_size=20)
    more_estimators = _wide(tmp_path, replicates=200, block_size=20, estimators={
        **tiny_study()["estimators"], "sd": {"function": "scale:sd", "target": "sd"}})
    for grown in (more_reps, more_scenarios, more_estimators):
        assert before <= set(jobs.shard_paths(grown, grown.layout(tmp_path)))


def test_a_packed_job_writes_the_same_shards_as_its_pieces_alone(tmp_path):
    """Job boundaries never change a number: every shard of a packed job is byte-for-byte
    the table its piece computes as a job of its own."""
    study = _wide(tmp_path, locations=5)
    (job,) = study.jobs
    assert len(job.pieces) == 10
    packed, alone = study.layout(tmp_path / "packed"), study.layout(tmp_path / "alone")
    record = run_job(jobs.job_spec(study, *job.key), study.search_dirs, packed)
    assert [(p["scenario"], p["first_block"]) for p in record["pieces"]] == [p.key for p in job.pieces]
    assert record["replicates"] == 10 * 20
    for piece in job.pieces:
        spec = jobs.piece_spec(study, *piece.key)
        run_piece(spec, study.search_dirs, shards_of_piece(alone, spec))
        for name in study.estimators:
            a = pq.read_table(packed.shard(piece.scenario, name, piece.first_block))
            b = pq.read_table(alone.shard(piece.scenario, name, piece.first_block))
            assert a.equals(b) and a.num_rows == 20


def test_values_per_job_regroups_the_jobs_and_moves_no_shard(tmp_path):
    """With blocks_per_job fixed, values_per_job sets only how pieces are grouped."""
    one_each = _wide(tmp_path, locations=10, replicates=100, block_size=20, blocks_per_job=1)
    grouped = _wide(tmp_path, locations=10, replicates=100, block_size=20, blocks_per_job=1,
                    values_per_job=2_000)
    assert len(one_each.jobs) == len(one_each.pieces) == 10 * 2 * 5
    # pieces draw 20 x 5 = 100 or 20 x 20 = 400 values; 25,000 in all -> 13 jobs of about 2,000
    assert len(grouped.jobs) == 13
    assert all(1_500 <= job.values <= 2_500 for job in grouped.jobs)
    assert jobs.shard_paths(grouped, grouped.layout(tmp_path)) == jobs.shard_paths(one_each, one_each.layout(tmp_path))


def test_values_per_job_must_be_a_positive_integer_or_auto(tmp_path):
    import pytest
    from estbench.core.errors import StudyError
    with pytest.raises(StudyError, match=r"`values_per_job`: must be a positive integer or 'auto'"):
        _wide(tmp_path, values_per_job=0)
