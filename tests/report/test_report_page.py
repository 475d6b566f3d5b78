"""The HTML report: its sections, self-containment, escaping, stability as a
study grows, and that it reads the store alone.

Stores are built the fast way: shards computed by the engine, then
``estbench.store.ingest`` — the same code the workflow's rules call.
"""

import csv
import re
import shutil
from pathlib import Path

import pytest

from estbench.study import jobs
from estbench.report.figure_queue import FigureQueue
from estbench.report.figures import exceedance_svg
from estbench.report.styles import estimator_styles
from estbench.core.layout import ResultsLayout
from estbench.report.render import render
from estbench.report.model import ReportModel
from estbench.report.stats import round_to_mcse
from estbench.report.sections.performance import TABLE_PARTS, contests, performance_tables
from estbench.simulate.job import run_shard
from estbench.analyse.store import ingest, open_read_only
from estbench.study.load import study_from_mapping

from conftest import tiny_study, write_study

SCRIPT = "<script>alert(1)</script>"

#: An estimator module beside a study: the mean, failing on about a quarter of
#: the replicates with a message that is HTML.
FRAGILE = f'''
import numpy as np
from estbench.simulate.estimator import per_replicate

@per_replicate
def fragile_mean(x):
    if x[0] > x[1] + 0.67:
        raise ValueError("{SCRIPT}")
    return float(np.mean(x))
'''


def build_store(folder: Path, raw: dict) -> Path:
    """Compute the study's missing shards with the engine and ingest them all."""
    study = study_from_mapping(raw, source=write_study(folder, raw))
    paths = jobs.shard_paths(study, study.layout(folder))
    for p in paths:
        if not p.exists():
            run_shard(jobs.shard_spec(study, p.parts[-3], p.parts[-2], int(p.stem)), study.search_dirs, p)
    store = folder / "results" / study.name / "store.duckdb"
    ingest(store, study, paths)
    return store


def render_report(store: Path, out: Path) -> str:
    """Render beside *store*, then keep a copy of the page and the CSVs in *out*."""
    layout = ResultsLayout.of_store(store)
    render(layout)
    out.mkdir(parents=True, exist_ok=True)
    for path in (layout.report_html, layout.performance_csv, layout.checks_csv):
        shutil.copy(path, out / path.name)
    return (out / "report.html").read_text(encoding="utf-8")


def rich_study(**overrides) -> dict:
    """Three sample sizes, three estimators, targets and every report option."""
    study = tiny_study(sample_sizes=[5, 20, 50], replicates=100, targets={"bias": 0.05, "coverage": 0.01},
                       report={"tolerance": 0.3, "zip": {"dgm": "normal", "n": 20},
                               "asymptotic_efficiency": {"median": {"normal": 0.6366}}})
    study["estimators"]["trim"] = {"function": "location:trimmed_mean", "target": "mean",
                                   "args": {"proportion": 0.2}, "description": "20% trimmed mean."}
    study.update(overrides)
    return study


def rendered(tmp_path_factory, name: str, study: dict) -> tuple[Path, Path, str]:
    """(folder, store, page) of *study* run and rendered in a new folder called *name*."""
    folder = tmp_path_factory.mktemp(name)
    store = build_store(folder, study)
    return folder, store, render_report(store, folder / "out")


@pytest.fixture(scope="module")
def rich_report(tmp_path_factory):
    return rendered(tmp_path_factory, "rich", rich_study())


def test_every_section_is_there_in_order(rich_report):
    _, _, html = rich_report
    ids = re.findall(r'<section id="([a-z]+)"', html)
    assert ids == ["glance", "precision", "performance", "convergence", "intervals", "efficiency", "appendix"]
    for anchor in ids:
        assert f'href="#{anchor}"' in html
    assert "results hold only for the data-generating" in html and "regulatory guidance" in html
    # study at a glance: ADEMP, replicates, seed, provenance
    for text in ("Aim", "Field survey of plot yields", "norm(loc = 2, scale = 1.5)", "mean = 2",
                 "Cramér–Rao bound known", "100 per scenario", "12345", "all 12 shards ran this code",
                 "numpy ", "s of compute in shards"):
        assert text in html, text
    # precision: targets, heterogeneity, failures
    assert "Monte Carlo SE against the targets" in html and "Between-block heterogeneity" in html
    assert "No replicate failed." in html
    # appendix: the study file as run and the shard table
    assert "study: tiny" in html and "shards/" in html


def test_page_is_self_contained_and_accessible(rich_report):
    folder, _, html = rich_report
    assert "http:" not in html and "https:" not in html
    assert "<script" not in html and "<link" not in html and " src=" not in html
    assert 'href="performance.csv"' in html and 'href="checks.csv"' in html
    assert (folder / "out" / "performance.csv").is_file() and (folder / "out" / "checks.csv").is_file()
    svgs = re.findall(r"<svg[^>]*>", html)
    assert len(svgs) == html.count("<figure>") == html.count("<figcaption>") == 7   # one DGM setting
    for tag in svgs:
        assert 'role="img"' in tag and re.search(r'aria-label="[^"]{20,}"', tag), tag
    ids = re.findall(r'\bid="([^"]+)"', html)
    assert len(ids) == len(set(ids)), "element ids must be unique across the page's figures"


def test_report_options_reach_the_page(rich_report):
    _, _, html = rich_report
    assert "t = 0.3 (set in the study file)" in html
    assert "Zip plot for normal, n = 20" in html
    assert "0.637 as n → ∞" in html                       # the asymptotic efficiency line's label
    assert "dotted lines are the known large-n values" in html


def test_estimators_keep_one_colour_everywhere(rich_report):
    _, _, html = rich_report
    styles = estimator_styles(["mean", "median", "trim"])
    for name, style in styles.items():
        assert f'<span class="swatch" style="background: {style.colour}"></span>{name}' in html
        assert style.colour.lower() in html.lower().split("<section id=\"convergence\">")[1]
    # adding an estimator keeps the others' styles
    assert estimator_styles(["mean", "median", "trim", "extra"])["trim"] == styles["trim"]


def performance_rows(folder: Path, *key: str) -> dict:
    """The rendered performance.csv, one row per value of the *key* columns."""
    with open(folder / "out" / "performance.csv") as fh:
        return {tuple(r[k] for k in key): r for r in csv.DictReader(fh)}


def test_table_cells_are_the_store_values_rounded_to_their_mcse(rich_report):
    folder, store, _ = rich_report
    rows = performance_rows(folder, "dgm", "n", "estimator", "measure")
    con = open_read_only(store)
    try:
        model = ReportModel.load(con)
        tables = performance_tables(model, contests(model, con))
    finally:
        con.close()
    shown = 0
    for table in tables:
        for part in table["parts"]:
            assert [m["name"] for m in part["measures"]] == [
                m for m in dict(TABLE_PARTS)[part["title"]] if any(k[3] == m for k in rows)]
            for group in part["groups"]:
                for row in group["rows"]:
                    for measure, cell in row["cells"].items():
                        r = rows[("normal", str(group["n"]), row["estimator"], measure)]
                        mcse = float(r["mcse"]) if r["mcse"] else None
                        assert cell["value"] == round_to_mcse(float(r["value"]), mcse)
                        shown += 1
    assert shown > 40


def test_a_leader_is_marked_only_beyond_two_mcse_of_the_paired_difference(tmp_path):
    # Two estimators that compute the same mean on the same datasets can never be
    # told apart; the median's larger spread under normal data is clear at n = 50.
    raw = tiny_study(sample_sizes=[50], replicates=400, block_size=20, blocks_per_job=20)
    raw["estimators"]["mean_again"] = {"function": "location:mean", "target": "mean"}
    store = build_store(tmp_path, raw)
    con = open_read_only(store)
    try:
        model = ReportModel.load(con)
        found = contests(model, con)
        scenario = model.scenarios[0]["scenario"]
        x = dict(con.execute("SELECT estimator, list(estimate ORDER BY rep) FROM estimates "
                             "WHERE status = 'ok' GROUP BY estimator").fetchall())
    finally:
        con.close()
    empirical_se = found[(scenario, "mean", "empirical_se")]
    assert {empirical_se.leader, empirical_se.runner_up} == {"mean", "mean_again"} and not empirical_se.decided
    # Without the copy the mean leads the median; check z against numpy on the same rows.
    import numpy as np
    mean, median = np.array(x["mean"]), np.array(x["median"])
    d = (median - median.mean()) ** 2 - (mean - mean.mean()) ** 2
    z = d.mean() / (d.std(ddof=1) / np.sqrt(d.size))
    assert z > 2   # the median's variance is about π/2 times the mean's at n = 50
    html = render_report(store, tmp_path / "out")
    assert "within Monte Carlo error of mean_again" in html
    raw["estimators"].pop("mean_again")
    solo = tmp_path / "solo"
    solo.mkdir()
    con = open_read_only(build_store(solo, raw))
    try:
        model = ReportModel.load(con)
        contest = contests(model, con)[(model.scenarios[0]["scenario"], "mean", "empirical_se")]
    finally:
        con.close()
    assert (contest.leader, contest.runner_up) == ("mean", "median") and contest.decided
    assert contest.z == pytest.approx(z, rel=1e-6)


def test_user_text_is_escaped_everywhere(tmp_path):
    (tmp_path / "fragile.py").write_text(FRAGILE)
    raw = tiny_study(description=f"Study {SCRIPT} & <b>bold</b>", replicates=40, blocks_per_job=4)
    raw["dgms"]["normal"]["description"] = f"DGM {SCRIPT}"
    raw["estimators"]["median"]["description"] = f"Estimator {SCRIPT}"
    raw["estimators"]["fragile"] = {"function": "fragile:fragile_mean", "target": "mean",
                                    "description": "Fails on some replicates."}
    html = render_report(build_store(tmp_path, raw), tmp_path / "out")
    assert SCRIPT not in html and "<script" not in html and "<b>bold" not in html
    escaped = "&lt;script&gt;alert(1)&lt;/script&gt;"
    for text in (f"Study {escaped}", f"DGM {escaped}", f"Estimator {escaped}", f"ValueError: {escaped}"):
        assert text in html, text
    # failures per scenario x estimator, with the messages as the count's tooltip, and per estimator
    assert len(re.findall(f'<td title="ValueError: {re.escape(escaped)} ×\\d+">\\d+ of 40 ', html)) == 2
    assert re.search(r"<td class=\"text\">fragile</td><td class=\"numbers\">\d+</td>", html)


def test_adding_an_estimator_changes_no_other_number(tmp_path):
    store = build_store(tmp_path, tiny_study())
    before_html = render_report(store, tmp_path / "v1")
    grown = tiny_study()
    grown["estimators"]["trim"] = {"function": "location:trimmed_mean", "target": "mean",
                                   "args": {"proportion": 0.2}}
    build_store(tmp_path, grown)
    after_html = render_report(store, tmp_path / "v2")

    def rows(folder):
        with open(folder / "performance.csv") as fh:
            return [r for r in csv.DictReader(fh)]

    old, new = rows(tmp_path / "v1"), rows(tmp_path / "v2")
    assert [r for r in new if r["estimator"] != "trim"] == old
    assert any(r["estimator"] == "trim" for r in new)
    assert ">trim</td>" in after_html and ">trim</td>" not in before_html
    assert before_html.count("<figure>") == after_html.count("<figure>")


def test_report_is_rendered_from_the_store_alone(rich_report, tmp_path):
    folder, store, html = rich_report
    lone = tmp_path / "elsewhere" / "store.duckdb"
    lone.parent.mkdir()
    shutil.copy(store, lone)                       # no shards, no study file, no estimator code
    again = render_report(lone, tmp_path / "out")
    assert again == html
    assert (tmp_path / "out" / "performance.csv").read_text() == (folder / "out" / "performance.csv").read_text()


def test_estimators_that_fail_too_often_are_flagged_with_plain_shares(tmp_path):
    # By construction: `short` fails on every replicate at n = 5 (100 of 100) and never at
    # n = 20; `gappy` is non-finite on 3 of the 10 replicates of every block (30 of 100).
    (tmp_path / "survey_rules.py").write_text(
        "import numpy as np\n\n"
        "def short(x):\n"
        "    if x.shape[1] < 10:\n"
        "        raise ValueError('too few plots')\n"
        "    return x.mean(axis=1)\n\n"
        "def gappy(x):\n"
        "    est = x.mean(axis=1)\n"
        "    est[:3] = np.nan\n"
        "    return est\n")
    raw = tiny_study(replicates=100, max_failed_share=0.25)
    raw["estimators"]["short"] = {"function": "survey_rules:short", "target": "mean"}
    raw["estimators"]["gappy"] = {"function": "survey_rules:gappy", "target": "mean"}
    html = render_report(build_store(tmp_path, raw), tmp_path / "out")
    precision = html.split('<section id="precision">')[1].split("</section>")[0]
    assert re.findall(r"<li>(.*?)</li>", precision) == [
        "short failed on every replicate of normal, n = 5 (100 of 100, 100%)",
        "gappy failed on 30 of 100 replicates of normal, n = 5 (30.0%), more than max_failed_share = 0.25",
        "gappy failed on 30 of 100 replicates of normal, n = 20 (30.0%), more than max_failed_share = 0.25"]
    assert '100 of 100 <span class="mcse">(100%)</span>' in precision and "e+02" not in html
    assert precision.count('30 of 100 <span class="mcse">(30.0%)</span>') == 2
    assert "3 scenario × estimator pairs failed too often</strong>" in html


def test_one_sample_size_and_no_intervals_are_said_plainly(tmp_path):
    raw = tiny_study(sample_sizes=[20], reference=None)
    raw.pop("reference")
    raw["estimators"] = {"mad": {"function": "scale:mad", "target": "sd"},
                         "iqr": {"function": "scale:iqr_sd", "target": "sd"}}
    html = render_report(build_store(tmp_path, raw), tmp_path / "out")
    assert "One sample size only: there is no curve in n to fit." in html
    assert "No estimator in this study gives an interval" in html
    assert "efficiency vs Cramér–Rao bound" in html        # the normal SD's bound is known
    assert "Relative efficiency" not in html.split('<section id="efficiency">')[1]


def test_figures_drawn_in_parallel_equal_those_drawn_one_by_one():
    styles = estimator_styles(["a", "b"])
    queues = []
    for _ in range(2):
        queue = FigureQueue()
        for k in range(5):
            series = {"a": {"n": [5, 10, 20], "value": [0.3, 0.2, 0.1 + k / 100], "mcse": [0.01] * 3},
                      "b": {"n": [5, 10, 20], "value": [0.35, 0.2, 0.12], "mcse": [0.01] * 3}}
            queue.add(exceedance_svg, "caption", "heading", f"figure {k}",
                      panels=[{"target": "mean", "tolerance": 0.2, "series": series}], styles=styles,
                      title=f"t{k}")
        queues.append(queue)
    queues[0].draw(workers=1)
    queues[1].draw(workers=2)
    first = [f["svg"] for f, _ in queues[0]._jobs]
    assert first == [f["svg"] for f, _ in queues[1]._jobs]
    assert len(set(first)) == 5 and 'aria-label="figure 3"' in first[3] and 'id="fig4-' in first[3]
