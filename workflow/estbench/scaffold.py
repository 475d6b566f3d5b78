"""``estbench new estimator NAME``: a commented estimator module and its test, to fill in."""

from __future__ import annotations

import keyword
from pathlib import Path

from .errors import UserError

ESTIMATOR_TEMPLATE = '''"""{name}: say what this estimator estimates and from which data.

estbench calls ``{name}(x, **args)`` once per seed block. ``x`` holds every
replicate of the block: an array of shape (replicates, n), one row per
simulated dataset (a dict of such arrays for the two_arm and regression
mechanisms). Work along axis 1 so all replicates are done in one go.

Return an array of estimates, or a dict with "estimate" and any of "se",
"ci_low", "ci_high", "p_value" - each one value per replicate. NaN marks a
replicate where a value is undefined; estbench records it and carries on.
A function that can only handle one dataset at a time can be decorated with
``estbench.estimator.per_replicate`` instead.

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


def test_one_value_per_replicate():
    x = np.random.default_rng(1).normal(size=(50, 12))
    out = {name}(x)
    assert out["estimate"].shape == (50,)
    assert np.all(out["ci_low"] <= out["ci_high"])


def test_against_a_known_answer():
    # Check your estimator against something you did not write: a closed form, a
    # published worked example or a reference library, and name the source here.
    # The starting point is the sample mean, so numpy's mean is the reference.
    x = np.random.default_rng(2).normal(size=(5, 8))
    np.testing.assert_allclose({name}(x)["estimate"], np.mean(x, axis=1), rtol=1e-12)
'''


def new_estimator(name: str, folder: Path) -> list[Path]:
    """Write ``NAME.py`` and ``test_NAME.py`` in *folder*; refuse to overwrite."""
    if not name.isidentifier() or keyword.iskeyword(name):
        raise UserError(f"`NAME` must be a Python identifier (letters, digits, _; not starting with "
                        f"a digit), got {name!r}")
    folder = Path(folder)
    if not folder.is_dir():
        raise UserError(f"`--dir` must be an existing folder, got {str(folder)!r}")
    module, test = folder / f"{name}.py", folder / f"test_{name}.py"
    for path in (module, test):
        if path.exists():
            raise UserError(f"{path} already exists; choose another NAME or move it away")
    module.write_text(ESTIMATOR_TEMPLATE.format(name=name))
    test.write_text(TEST_TEMPLATE.format(name=name, test_file=test.name))
    return [module, test]
