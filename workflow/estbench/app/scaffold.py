"""Scaffolding: ``estbench init`` (a study project) and ``estbench new estimator NAME``
(a commented estimator module and its test, to fill in)."""

from __future__ import annotations

import importlib.util
import keyword
import sys
from pathlib import Path

from estbench.core.bundled import BUILTIN_ESTIMATORS
from estbench.core.errors import UserError

ESTIMATOR_TEMPLATE = '''"""{name}: say what this estimator estimates and from which data.

estbench calls ``{name}(x, **args)`` once per seed block. ``x`` holds every
replicate of the block: an array of shape (replicates, n), one row per
simulated dataset (a dict of such arrays for the two_arm and regression
mechanisms). Work along axis 1 so all replicates are done in one go.

Return an array of estimates, or a dict with "estimate" and any of "se",
"ci_low", "ci_high", "p_value" - each one value per replicate. NaN marks a
replicate where a value is undefined; estbench records it and carries on.
A function that can only handle one dataset at a time can be decorated with
``estbench.per_replicate`` instead (``from estbench import per_replicate``).

Name it in a study:

    estimators:
      {name}: {{function: "{name}:{name}", target: mean}}
"""

import numpy as np
from scipy import stats


def {name}(x, level=0.95, null_value=0.0):
    """Replace the body with your method; this starting point is the sample mean.

    Parameters
    ----------
    x : array (replicates, n)
    level : the study's confidence level (estbench passes it because it is declared).
    null_value : value of the estimand under the null hypothesis of the test.
    """
    x = np.asarray(x, dtype=float)
    n = x.shape[1]
    estimate = x.mean(axis=1)                       # <- your estimator here
    se = x.std(axis=1, ddof=1) / np.sqrt(n)         # <- its standard error, if it has one
    z = stats.norm.ppf(0.5 + level / 2)
    p_value = 2 * stats.norm.sf(np.abs(estimate - null_value) / se)
    return {{"estimate": estimate, "se": se, "ci_low": estimate - z * se,
            "ci_high": estimate + z * se, "p_value": p_value}}
'''

TEST_TEMPLATE = '''"""Tests of {name}: run them with `python -m pytest {test_file}`."""

import numpy as np

from {name} import {name}


def outputs(x):
    """{name}'s result as a dict, whichever form it returns (an array means estimates only)."""
    out = {name}(x)
    return out if isinstance(out, dict) else {{"estimate": np.asarray(out)}}


def test_one_value_per_replicate():
    x = np.random.default_rng(1).normal(size=(50, 12))
    out = outputs(x)
    for values in out.values():
        assert np.shape(values) == (50,)
    if "ci_low" in out and "ci_high" in out:
        assert np.all(out["ci_low"] <= out["ci_high"])


def test_against_a_known_answer():
    # Check your estimator against something you did not write: a closed form, a
    # published worked example or a reference library, and name the source here.
    # The starting point is the sample mean, so numpy's mean is the reference.
    x = np.random.default_rng(2).normal(size=(5, 8))
    np.testing.assert_allclose(outputs(x)["estimate"], np.mean(x, axis=1), rtol=1e-12)
'''


PROJECT_STUDY = """\
# A study project made by `estbench init` (invented scenario: an orchard survey).
# Every key is explained in estbench's README ("The study file"); `estbench check`
# validates this file and says what it would run.
study: orchard-apple-weights     # used in paths: results/<study>/
description: >
  A field survey weighs n apples from each tree and reports one typical weight
  per tree. Most trees give weights scattered normally around 150 g; after a
  storm some windfall fruit is far lighter or heavier. Both mechanisms are
  symmetric around 150 g, so every summary aims at the same estimand. Is the
  survey's home-made midhinge a better summary than the mean or the median?
seed: 20261203                   # root of every random stream; keep it fixed
replicates: 1000                 # per scenario, rounded up to whole seed blocks
block_size: 100                  # replicates per seed block; fixed for the life of a study
level: 0.95                      # nominal level of the intervals
sample_sizes: [10, 30, 100]      # every DGM runs at every n
dgms:
  steady:
    description: Apples from a healthy tree, normal with SD 20 g.
    distribution: norm           # any scipy.stats distribution, by name
    params: {loc: 150.0, scale: 20.0}
  windfall:
    description: One apple in ten is windfall, weighed with three times the spread.
    mixture:
      - {weight: 0.9, distribution: norm, params: {loc: 150.0, scale: 20.0}}
      - {weight: 0.1, distribution: norm, params: {loc: 150.0, scale: 60.0}}
estimators:
  mean:
    function: "location:mean"    # built in: module location, function mean
    target: mean
    description: Arithmetic mean, with a t interval.
  median:
    function: "location:median"
    target: mean
    description: Sample median, with an order-statistic interval.
  midhinge:
    function: "midhinge:midhinge"   # the plug-in in estimators/midhinge.py
    target: mean
    description: Average of the lower and upper quartiles.
reference: mean                  # relative efficiency is measured against it
targets:                         # largest acceptable Monte Carlo SE per measure
  bias: 0.2
# max_failed_share: 0.2          # warn, and `estbench run` exits 3, when an estimator fails on
#                                # more than this share of a scenario's replicates (default 0.2)
# values_per_job: auto           # values (replicates x n) one job draws; raise it on a cluster
#                                # so each job computes for minutes (docs/cluster.md)
"""

#: The example plug-in estimator of a new project.
PLUGIN_NAME = "midhinge"

PLUGIN_MODULE = '''"""midhinge: the average of the lower and upper quartiles, a robust summary of location.

An example plug-in estimator made by ``estbench init``. estbench calls
``midhinge(x)`` once per seed block with ``x`` of shape (replicates, n), one
row per simulated dataset, and uses the returned estimate of every row.
Change it, or start your own with ``estbench new estimator NAME``.
"""

import numpy as np


def midhinge(x):
    """(Q1 + Q3) / 2 of each row, quartiles by linear interpolation.

    Parameters
    ----------
    x : array (replicates, n)

    Returns
    -------
    dict with "estimate": one value per replicate.
    """
    q1, q3 = np.quantile(np.asarray(x, dtype=float), [0.25, 0.75], axis=1)
    return {"estimate": (q1 + q3) / 2}
'''

PLUGIN_TEST = '''"""Tests of the midhinge: run them with `python -m pytest estimators`."""

import numpy as np
from scipy import stats

from midhinge import midhinge


def test_one_value_per_replicate():
    x = np.random.default_rng(1).normal(size=(50, 12))
    assert midhinge(x)["estimate"].shape == (50,)


def test_against_scipy_quartiles():
    # Reference: scipy.stats.scoreatpercentile, whose default interpolation is linear.
    x = np.random.default_rng(2).gamma(2.0, size=(5, 9))
    expected = [(stats.scoreatpercentile(row, 25) + stats.scoreatpercentile(row, 75)) / 2 for row in x]
    np.testing.assert_allclose(midhinge(x)["estimate"], expected, rtol=1e-12)


def test_a_worked_example():
    # 1, 2, ..., 8: Q1 = 2.75 and Q3 = 6.25 by linear interpolation (common practice), so 4.5.
    assert midhinge(np.arange(1.0, 9.0)[None, :])["estimate"][0] == 4.5
'''

PROJECT_GITIGNORE = """\
# generated by estbench runs: results and workflow state
results/
.snakemake/
__pycache__/
"""

PROJECT_README = """\
# {title}

A simulation study run with estbench. `study.yaml` is the study; `estimators/`
holds this project's own estimators (found before estbench's built-in ones).

```bash
estbench check                    # validate study.yaml, say what it would run
estbench run --cores 2            # simulate, store, report: results/<study>/report.html
python -m pytest estimators       # test the plug-in estimators
estbench new estimator NAME       # start another estimator in estimators/
estbench status                   # what the next run computes and why
```

Commit `study.yaml` and `estimators/`; `results/` is generated (and git-ignored).
Results hold only for the mechanisms simulated; decisions about a real study rest
with its statisticians and the applicable regulatory guidance.
"""


def _check_name(name: str) -> None:
    if not name.isidentifier() or keyword.iskeyword(name):
        raise UserError(f"`NAME` must be a Python identifier (letters, digits, _; not starting with "
                        f"a digit), got {name!r}")


def _check_hides_nothing(name: str) -> None:
    """A new module *name* must not hide a module a study may need."""
    if (BUILTIN_ESTIMATORS / f"{name}.py").is_file():
        raise UserError(f"`NAME`: {name!r} would hide estbench's built-in estimator module {name} "
                        f"(used as \"{name}:...\" in studies); choose another name")
    if name in sys.stdlib_module_names or importlib.util.find_spec(name) is not None:
        raise UserError(f"`NAME`: {name!r} is already an importable Python module, which a module of "
                        f"that name beside the study would hide; choose another name")


def _refuse_existing(files) -> None:
    for path in files:
        if path.exists():
            raise UserError(f"{path} already exists; move it away or choose another folder")


def _write_new(files: dict[Path, str]) -> list[Path]:
    """Write every file, refusing before writing any if one of them exists."""
    _refuse_existing(files)
    for path, text in files.items():
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
    return list(files)


def new_estimator(name: str, folder: Path | None = None) -> list[Path]:
    """Write ``NAME.py`` and ``test_NAME.py`` in *folder* (default: ``./estimators`` if
    it exists, else ``.``); refuse to overwrite."""
    _check_name(name)
    if folder is None:
        folder = Path("estimators") if Path("estimators").is_dir() else Path(".")
    folder = Path(folder)
    if not folder.is_dir():
        raise UserError(f"`--dir` must be an existing folder, got {str(folder)!r}")
    module, test = folder / f"{name}.py", folder / f"test_{name}.py"
    files = {module: ESTIMATOR_TEMPLATE.format(name=name), test: TEST_TEMPLATE.format(name=name, test_file=test.name)}
    _refuse_existing(files)
    _check_hides_nothing(name)
    return _write_new(files)


def new_project(folder: Path | str) -> list[Path]:
    """Create a study project in *folder*: the study file, a plug-in estimator and its
    test, a .gitignore and a README. Refuses to overwrite any existing file."""
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise UserError(f"`DIR` must be a folder, got the file {str(folder)!r}")
    return _write_new({
        folder / "study.yaml": PROJECT_STUDY,
        folder / "estimators" / f"{PLUGIN_NAME}.py": PLUGIN_MODULE,
        folder / "estimators" / f"test_{PLUGIN_NAME}.py": PLUGIN_TEST,
        folder / ".gitignore": PROJECT_GITIGNORE,
        folder / "README.md": PROJECT_README.format(title=folder.resolve().name or "study"),
    })
