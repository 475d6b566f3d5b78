"""Failed replicates: which scenario x estimator pairs are flagged, and how shares print.

The rules checked here are estbench's own choices (common practice, no published
source): a pair is flagged when it failed on every replicate or on a share strictly
above ``max_failed_share``; a share prints with one decimal, all as '100%', and a
share that is neither none nor all never prints as '0.0%' or '100.0%'.
"""

import pytest
from estbench.analyse.failures import (
    FailureWarning,
    failure_warnings,
    max_failed_share_of,
    share_text,
)
from estbench.study.model import DEFAULT_MAX_FAILED_SHARE
from estbench.study.schema import load_schema


@pytest.mark.parametrize("part, whole, text", [
    (0, 200, "0.0%"), (25, 200, "12.5%"), (200, 200, "100%"), (1, 3, "33.3%"), (2, 3, "66.7%"),
    (1, 100_000, "<0.1%"), (99_999, 100_000, ">99.9%"), (1, 1000, "0.1%"), (999, 1000, "99.9%"),
])
def test_shares_print_with_one_decimal_and_never_hide_a_failure(part, whole, text):
    assert share_text(part, whole) == text


@pytest.mark.parametrize("part, whole", [(3, 2), (-1, 5), (0, 0)])
def test_a_share_needs_a_part_of_a_whole(part, whole):
    with pytest.raises(ValueError, match="`part` must be between 0 and `whole`"):
        share_text(part, whole)


def _counts(*rows):
    return [{"scenario": s, "estimator": e, "rows": n, "failed": f} for s, e, n, f in rows]


COUNTS = _counts(("s1", "a", 60, 60), ("s1", "b", 60, 12), ("s2", "b", 60, 13), ("s2", "a", 60, 0),
                 ("s3", "a", 0, 0))


def test_every_failure_and_shares_above_the_limit_are_flagged_in_study_order():
    found = failure_warnings(COUNTS, 0.2, scenarios=["s2", "s1", "s3"], estimators=["b", "a"])
    # 12 of 60 is exactly 0.2: not above the limit; 13 of 60 is; 60 of 60 always is.
    assert found == [FailureWarning("s2", "b", 13, 60, 0.2), FailureWarning("s1", "a", 60, 60, 0.2)]
    assert [w.every for w in found] == [False, True]


def test_the_limit_decides_which_shares_are_flagged():
    names = {"scenarios": ["s1", "s2", "s3"], "estimators": ["a", "b"]}
    assert [(w.scenario, w.estimator) for w in failure_warnings(COUNTS, 0, **names)] == [
        ("s1", "a"), ("s1", "b"), ("s2", "b")]
    assert [(w.scenario, w.estimator) for w in failure_warnings(COUNTS, 0.5, **names)] == [("s1", "a")]


@pytest.mark.parametrize("limit", [1, 1.5, -0.01])
def test_the_limit_must_be_a_share_below_one(limit):
    with pytest.raises(ValueError, match=r"`max_failed_share` must be in \[0, 1\)"):
        failure_warnings(COUNTS, limit, ["s1"], ["a"])


def test_warnings_say_count_share_and_limit():
    assert FailureWarning("s1", "picky", 200, 200, 0.2).text("normal, n = 5") == \
        "picky failed on every replicate of normal, n = 5 (200 of 200, 100%)"
    assert FailureWarning("s1", "patchy", 25, 200, 0.1).text("normal, n = 20") == \
        "patchy failed on 25 of 200 replicates of normal, n = 20 (12.5%), more than max_failed_share = 0.1"


def test_a_store_without_the_key_uses_the_default_the_schema_states():
    assert load_schema()["properties"]["max_failed_share"]["default"] == DEFAULT_MAX_FAILED_SHARE == 0.2
    assert max_failed_share_of({"name": "old"}) == max_failed_share_of({"max_failed_share": None}) == 0.2
    assert max_failed_share_of({"max_failed_share": 0.5}) == 0.5
