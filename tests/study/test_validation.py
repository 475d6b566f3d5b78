"""Bad study files: one clear line naming the key and the rule, exit 2, nothing written."""

import pytest

from conftest import run_cli, tiny_study, write_study


def _bad(**changes):
    study = tiny_study()
    for key, value in changes.items():
        if value is DELETE:
            study.pop(key)
        else:
            study[key] = value
    return study


DELETE = object()

CASES = {
    "unknown key": (_bad(replicats=100), "`replicats`: unknown key"),
    "unknown distribution": (
        _bad(dgms={"normal": {"distribution": "gaussian", "params": {}}}),
        "`dgms.normal.distribution`: scipy.stats has no distribution 'gaussian'"),
    "zero n": (_bad(sample_sizes=[5, 0]), "`sample_sizes[1]`: must be >= 1, got 0"),
    "negative n": (_bad(sample_sizes=[-3]), "`sample_sizes[0]`: must be >= 1, got -3"),
    "non-integer replicates": (_bad(replicates=10.5), "`replicates`: must be an integer, got 10.5"),
    "level above 1": (_bad(level=1.5), "`level`: must be < 1, got 1.5"),
    "level zero": (_bad(level=0), "`level`: must be > 0, got 0"),
    "estimator not importable": (
        _bad(estimators={"mean": {"function": "nosuchmodule:mean", "target": "mean"}}),
        "`estimators.mean.function`: cannot use 'nosuchmodule:mean': no module 'nosuchmodule'"),
    "callable missing": (
        _bad(estimators={"mean": {"function": "location:nosuch", "target": "mean"}}),
        "`estimators.mean.function`: cannot use 'location:nosuch': module 'location' has no attribute 'nosuch'"),
    "estimand the DGM cannot supply": (
        _bad(dgms={"wild": {"distribution": "cauchy", "params": {}}}),
        "`estimators.mean.target`: DGM 'wild' cannot supply the estimand 'mean' (it supplies: median)"),
    "study name with slash": (_bad(study="a/b"), "`study`: may contain only letters, digits"),
    "study name with dots": (_bad(study=".."), "`study`: may contain only letters, digits"),
    "bad distribution parameter": (
        _bad(dgms={"normal": {"distribution": "norm", "params": {"scale": [1, -2]}}}),
        "`dgms.normal.params.scale[1]`: scipy.stats.norm rejects the parameters"),
    "missing key": (_bad(seed=DELETE), "`seed`: required key is missing"),
    "unknown reference": (_bad(reference="mode"), "`reference`: 'mode' is not one of the estimators"),
    "bad DGM name": (_bad(dgms={"a b": {"distribution": "norm"}}),
                     "`dgms`: key 'a b' must start with a letter"),
    "YAML null as an argument name": (
        _bad(estimators={"mean": {"function": "location:mean", "target": "mean", "args": {None: 1}}}),
        "`estimators.mean.args`: key None must be a Python identifier"),
    "zero blocks per job": (_bad(blocks_per_job=0),
                            "`blocks_per_job`: must be a positive integer or 'auto', got 0"),
    "unknown target measure": (_bad(targets={"bias": 0.1, "speed": 1}),
                               "`targets`: key 'speed' must be a measure name: bias, relative_bias"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_study_is_refused_with_a_clear_line(tmp_path, case):
    study, expected = CASES[case]
    proc = run_cli("check", write_study(tmp_path, study), cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr
    assert expected in proc.stderr, proc.stderr
    assert "Traceback" not in proc.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["study.yaml"]  # nothing written


@pytest.mark.parametrize("case", ["unknown key", "estimand the DGM cannot supply", "study name with dots"])
def test_run_refuses_before_snakemake_starts(tmp_path, case):
    # `run` validates with the same code as `check`, before Snakemake writes anything.
    study, expected = CASES[case]
    proc = run_cli("run", write_study(tmp_path, study), cwd=tmp_path)
    assert proc.returncode == 2 and expected in proc.stderr and "Traceback" not in proc.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["study.yaml"]  # no results/, no .snakemake/


def test_malformed_yaml_names_the_line(tmp_path):
    path = tmp_path / "study.yaml"
    path.write_text("study: x\nseed: [1, 2\nreplicates: 3\n")
    proc = run_cli("run", path, cwd=tmp_path)
    assert proc.returncode == 2 and "is not valid YAML at line" in proc.stderr
    assert "Traceback" not in proc.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["study.yaml"]


def test_duplicate_yaml_key_is_refused(tmp_path):
    path = tmp_path / "study.yaml"
    path.write_text("study: x\nseed: 1\nseed: 2\n")
    proc = run_cli("check", path, cwd=tmp_path)
    assert proc.returncode == 2 and "duplicate key 'seed'" in proc.stderr


def test_every_problem_is_reported_at_once(tmp_path):
    path = write_study(tmp_path, _bad(replicates=0, level=2, colour="blue", sample_sizes=[0]))
    proc = run_cli("check", path, cwd=tmp_path)
    assert proc.returncode == 2
    assert "has 4 problems" in proc.stderr
    for key in ("`replicates`", "`level`", "`colour`", "`sample_sizes[0]`"):
        assert key in proc.stderr


def test_missing_study_file_and_missing_store(tmp_path):
    proc = run_cli("check", tmp_path / "nope.yaml", cwd=tmp_path)
    assert proc.returncode == 2 and "cannot read study file" in proc.stderr
    path = write_study(tmp_path, tiny_study())
    proc = run_cli("report", path, cwd=tmp_path)
    assert proc.returncode == 2 and "no store at" in proc.stderr and "Traceback" not in proc.stderr


def test_check_summarises_a_valid_study(tmp_path):
    proc = run_cli("check", write_study(tmp_path, tiny_study()), cwd=tmp_path, check=True)
    assert "2 scenario(s), 2 estimator(s), 60 replicates per scenario (6 seed block(s) of 10), " \
           "4 simulation job(s), 8 shard(s)" in proc.stdout
    assert "warning: each scenario has 6 seed block(s); the jackknife MCSEs (rmse, relative_mse) " \
           "need at least 20" in proc.stderr
    enough = run_cli("check", write_study(tmp_path, tiny_study(replicates=200)), cwd=tmp_path, check=True)
    assert "warning" not in enough.stderr


def test_report_options_must_name_what_the_study_has(tmp_path):
    study = tiny_study(report={"tolerance": {"mean": 0.1}, "zip": {"dgm": "nope", "n": 7},
                               "asymptotic_efficiency": {"median": {"normal": 0.6366}, "mode": {}}})
    proc = run_cli("check", write_study(tmp_path, study), cwd=tmp_path)
    assert proc.returncode == 2
    for line in ("`report.zip.dgm`: 'nope' is not one of the DGMs (normal)",
                 "`report.zip.n`: 7 is not one of the sample sizes",
                 "`report.asymptotic_efficiency.mode`: not one of the estimators"):
        assert line in proc.stderr
    ok = tiny_study(report={"tolerance": 0.25, "zip": {"dgm": "normal", "n": 20},
                            "asymptotic_efficiency": {"median": {"normal": 0.6366}}})
    assert run_cli("check", write_study(tmp_path, ok), cwd=tmp_path).returncode == 0


@pytest.mark.parametrize("cores", ["0", "-1"])
def test_run_refuses_cores_below_one(tmp_path, cores):
    path = write_study(tmp_path, tiny_study())
    proc = run_cli("run", path, "--cores", cores, cwd=tmp_path, timeout=60)
    assert proc.returncode == 2
    assert proc.stderr.strip() == f"estbench: `--cores` must be a positive integer, got {cores}"
    assert not (tmp_path / "results").exists()


def test_schema_and_meaning_problems_come_in_one_pass(tmp_path):
    """A bad seed (schema), an unknown distribution and an unknown reference (meaning):
    all three at once, not over three rounds of fixes."""
    study = _bad(seed=-1, reference="zz", dgms={"plots": {"distribution": "normal", "params": {"loc": 1.0}}})
    proc = run_cli("check", write_study(tmp_path, study), cwd=tmp_path)
    assert proc.returncode == 2 and "has 3 problems" in proc.stderr, proc.stderr
    for text in ("`seed`: must be >= 0, got -1",
                 "`dgms.plots.distribution`: scipy.stats has no distribution 'normal'",
                 "`reference`: 'zz' is not one of the estimators (mean, median)"):
        assert text in proc.stderr


def test_an_estimator_refused_by_the_schema_leaves_the_others_checked(tmp_path):
    study = _bad(estimators={"mean": {"function": "location:mean"},                     # no target
                             "ghost": {"function": "nosuchmodule:f", "target": "mean"}},
                 reference="mean", level=3)
    proc = run_cli("check", write_study(tmp_path, study), cwd=tmp_path)
    assert "has 3 problems" in proc.stderr, proc.stderr
    for text in ("`estimators.mean.target`: required key is missing", "`level`: must be < 1, got 3",
                 "`estimators.ghost.function`: cannot use 'nosuchmodule:f'"):
        assert text in proc.stderr
    assert "`reference`" not in proc.stderr      # it names the estimator refused above
