"""Bad study files: one clear line naming the key and the rule, exit 2, nothing written."""

import pytest
from conftest import cli_here, run_cli, tiny_study, write_study


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
    "replicates as text": (_bad(replicates="many"), "`replicates`: must be an integer, got 'many'"),
    "negative replicates": (_bad(replicates=-5), "`replicates`: must be >= 1, got -5"),
    "sample sizes not a list": (_bad(sample_sizes=5), "`sample_sizes`: must be an array, got 5"),
    "repeated sample size": (_bad(sample_sizes=[5, 5]), "`sample_sizes`: must not repeat a value, got [5, 5]"),
    "seed as text": (_bad(seed="abc"), "`seed`: must be an integer, got 'abc'"),
    "negative target": (_bad(targets={"bias": -0.1}), "`targets.bias`: must be > 0, got -0.1"),
    "no estimators": (_bad(estimators={}, reference=DELETE), "`estimators`: must have at least 1 entry"),
    "unknown DGM kind": (_bad(dgms={"normal": {"shape": "bell"}}),
                         "`dgms.normal`: needs exactly one of: `distribution`"),
    "unknown mechanism": (_bad(dgms={"normal": {"mechanism": "teleport"}}),
                          ("`dgms.normal.mechanism`: must be one of two_arm, regression, proportion, "
                           "counts, got 'teleport'")),
    "two DGM names for one DGM": (
        _bad(dgms={"normal": {"distribution": "norm", "params": {"loc": 2.0}},
                   "gauss": {"distribution": "norm", "params": {"loc": 2.0}}}),
        "`dgms.gauss`: draws the same data as `dgms.normal` (identical spec); remove one of them"),
    "function without a module": (_bad(estimators={"mean": {"function": "mean", "target": "mean"}}),
                                  "`estimators.mean.function`: must have the form module:callable"),
    "function not callable": (_bad(estimators={"mean": {"function": "location:np", "target": "mean"}}),
                              "`estimators.mean.function`: cannot use 'location:np': location:np is not callable"),
    "estimand no DGM knows": (_bad(estimators={"mean": {"function": "location:mean", "target": "speed"}}),
                              "`estimators.mean.target`: DGM 'normal' cannot supply the estimand 'speed'"),
    "argument the estimator does not take": (
        _bad(estimators={"mean": {"function": "location:mean", "target": "mean", "args": {"speed": 1}}}),
        ("`estimators.mean.function`: a trial run on DGM 'normal' (n = 20) failed: TypeError: mean() got "
         "an unexpected keyword argument 'speed'")),
    "unknown estimator key": (
        _bad(estimators={"mean": {"function": "location:mean", "target": "mean", "colour": "red"}}),
        "`estimators.mean.colour`: unknown key; allowed keys: args, description, function, target"),
    "a list, not a study": ([1, 2], "`(top level)`: the study must be a mapping of keys, got list"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_study_is_refused_with_a_clear_line(tmp_path, case, capsys, monkeypatch):
    study, expected = CASES[case]
    code, _, err = cli_here(capsys, monkeypatch, tmp_path, "check", write_study(tmp_path, study))
    assert code == 2, err
    assert expected in err, err
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


#: Study files that cannot be read as a mapping at all: name -> (bytes, or None for a
#: folder in the file's place; the message).
UNREADABLE = {
    "empty file": (b"", "is empty"),
    "only comments": (b"# plot yields, to be filled in\n", "is empty"),
    "not UTF-8": (b"\xff\xfe\x00plots", "is not UTF-8 text: byte 0xff at position 0"),
    "tab indentation": (b"study: x\n\tseed: 1\n", "is not valid YAML at line 2, column 1"),
    "an estimator named twice": (
        (b"study: x\nestimators:\n  mean: {function: location:mean, target: mean}\n"
         b"  mean: {function: location:median, target: mean}\n"), "duplicate key 'mean'"),
    "a folder": (None, "cannot read study file"),
}


@pytest.mark.parametrize("case", sorted(UNREADABLE))
def test_unreadable_study_file_is_refused(tmp_path, case, capsys, monkeypatch):
    content, expected = UNREADABLE[case]
    path = tmp_path / "study.yaml"
    path.mkdir() if content is None else path.write_bytes(content)
    code, _, err = cli_here(capsys, monkeypatch, tmp_path, "check", path)
    assert code == 2 and expected in err and str(path) in err, err
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
