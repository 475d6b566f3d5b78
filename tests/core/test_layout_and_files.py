"""The results layout names every file one way, and atomic writes never leave half a file."""

from pathlib import Path

import pytest

from estbench.core.files import atomic_path, write_text_atomically
from estbench.core.hashing import canonical_json, short_hash
from estbench.core.layout import ResultsLayout


def test_layout_spells_every_path_under_results_of_the_study():
    layout = ResultsLayout.of("lab", "/work/here")
    assert layout.root == Path("/work/here/results/lab") and layout.workdir == Path("/work/here")
    assert layout.store == layout.root / "store.duckdb"
    assert layout.shard("0123456789abcdef", "mean", 40) == layout.root / "shards/0123456789abcdef/mean/40.parquet"
    assert layout.job_record("0123456789abcdef", 40) == layout.root / "jobs/0123456789abcdef/40.json"
    assert layout.job_spec("0123456789abcdef", 40) == layout.root / "specs/0123456789abcdef/40.json"
    assert layout.job_log("{scenario}", "{first_block}") == layout.root / "logs/jobs/{scenario}/{first_block}.log"
    assert ResultsLayout.of_store(layout.store) == layout


def test_layout_finds_itself_from_a_shard_or_a_job_record():
    layout = ResultsLayout.of("lab", "w")
    shard = layout.shard("0123456789abcdef", "median", 20)
    assert ResultsLayout.of_shard(shard) == layout
    assert ResultsLayout.of_job_record(layout.job_record("0123456789abcdef", 20)) == layout
    with pytest.raises(ValueError, match="not a shard path"):
        ResultsLayout.of_shard(Path("w/results/lab/elsewhere/0123456789abcdef/median/20.parquet"))
    with pytest.raises(ValueError, match="not a job record path"):
        ResultsLayout.of_job_record(Path("w/results/lab/records/0123456789abcdef/20.json"))


def test_a_failed_atomic_write_keeps_the_old_file_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "deep" / "out.txt"
    write_text_atomically(target, "first\n")
    with pytest.raises(RuntimeError):
        with atomic_path(target) as tmp:
            tmp.write_text("half of the sec")
            raise RuntimeError("killed half way")
    assert target.read_text() == "first\n"
    assert sorted(p.name for p in target.parent.iterdir()) == ["out.txt"]
    write_text_atomically(target, "second\n")
    assert target.read_text() == "second\n"


def test_canonical_json_hashes_integral_floats_like_ints():
    # 0.0 and 0 must give the same scenario key, whatever the YAML wrote (common practice).
    assert canonical_json({"b": [1.0, 2.5], "a": 0.0}) == '{"a":0,"b":[1,2.5]}'
    assert short_hash({"loc": 10.0}) == short_hash({"loc": 10}) and len(short_hash({})) == 16
