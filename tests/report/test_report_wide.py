"""A wide study (many DGM settings) gets the compact report: one table with a row
group per scenario, figures across the settings, and the per-setting figures of
a few settings only; the queries it makes do not grow with the scenarios.

The layout rules are the report's own (common practice for wide grids, no
outside source); the numbers in the table are checked against performance.csv,
whose measures are checked against outside references in tests/analyse.
"""

import json
from contextlib import closing
import re

import pytest

from estbench.analyse.store import open_read_only
from estbench.report.figure_queue import FigureQueue
from estbench.report.model import (DETAIL_SETTINGS, SHOWN_PER_DGM, ReportModel, families_of, shown_families,
                                   sweeps_of)
from estbench.report.render import build_context
from estbench.report.stats import round_to_mcse

from conftest import tiny_study
from test_report_browser import chromium, opens_cleanly_with_figures  # noqa: F401  (a fixture)
from test_report_page import build_store, performance_rows, rendered

LOCS = 15               #: DGM settings of the wide study (more than DETAIL_SETTINGS)
SIZES = [5, 20]


def wide_study(locs: int = LOCS) -> dict:
    """One normal DGM swept over *locs* locations x 2 sample sizes, 20 replicates each."""
    return tiny_study(study="wide", replicates=20, block_size=10, blocks_per_job=2, sample_sizes=SIZES,
                      dgms={"normal": {"distribution": "norm",
                                       "params": {"loc": list(range(locs)), "scale": 1.5}}})


@pytest.fixture(scope="module")
def wide_report(tmp_path_factory):
    return rendered(tmp_path_factory, "wide", wide_study())


def section(html: str, name: str) -> str:
    return html.split(f'<section id="{name}">')[1].split("</section>")[0]


def test_a_wide_study_gets_one_table_with_a_row_group_per_scenario(wide_report):
    folder, _, html = wide_report
    assert LOCS > DETAIL_SETTINGS
    perf = section(html, "performance")
    assert re.findall(r'<h3 id="perf-([^"]+)"', perf) == ["all"]        # no table per setting
    tables = perf.split("<caption>")[1:]
    assert [t.split("<")[0] for t in tables] == ["Estimation", "Inference"]
    scenarios = LOCS * len(SIZES)
    for table in tables:
        assert table.count("<tbody>") == scenarios                       # one row group per scenario
        assert table.count("<tr>") == 1 + 2 * scenarios                  # the header, then 2 estimators each
        assert '<th scope="col">loc</th><th scope="col">n</th>' in table
    # Each cell is the store's value rounded to its MCSE, with the MCSE beside it.
    rows = performance_rows(folder, "loc", "n", "estimator", "measure")
    estimation = tables[0]
    checked = 0
    for group in estimation.split("<tbody>")[1:]:
        loc, n = re.findall(r'<th scope="rowgroup" rowspan="2">([^<]+)</th>', group)
        for est, bias in re.findall(r"</span>(mean|median)</td><td[^>]*>(.*?)</td>", group):
            r = rows[(loc, n, est, "bias")]
            value = round_to_mcse(float(r["value"]), float(r["mcse"]))
            assert re.fullmatch(rf'(<span class="v">)?{re.escape(value)}(&#8239;[▲≈]</span>)? '
                                rf'<span class="mcse">±[0-9.e-]+</span>', bias), bias
            checked += 1
    assert checked == 2 * scenarios


def test_a_wide_study_draws_few_figures(wide_report):
    _, _, html = wide_report
    shown = [f"normal (loc = {loc})" for loc in (0, 7, 14)]               # first, middle, last
    assert len(shown) == SHOWN_PER_DGM
    assert re.findall(r'<h3 id="conv-[^"]+">([^<]+)</h3>', html) == shown
    assert re.findall(r'<h3 id="int-[^"]+">([^<]+)</h3>', html) == shown
    assert re.findall(r'<h3 id="eff-[^"]+">([^<]+)</h3>', html) == shown
    # Across the settings: bias/SE/RMSE, rates, coverage/width, efficiency (one estimand).
    across = re.findall(r'<svg role="img" aria-label="[^"]* against loc for normal, one line per estimator',
                        html)
    rates = re.findall(r'<svg role="img" aria-label="Fitted exponents of n [^"]* against loc', html)
    assert (len(across), len(rates)) == (3, 1)
    # Per shown setting: curves in n, histograms, scaled errors, exceedance, coverage,
    # efficiency; and one zip plot. 4 + 3 x 6 + 1 = 23, whatever the number of settings.
    assert html.count("<figure>") == 4 + SHOWN_PER_DGM * 6 + 1 == 23
    assert len(html) < 1_500_000
    ids = re.findall(r'\bid="([^"]+)"', html)
    assert len(ids) == len(set(ids))
    note = "A wide study: 15 DGM settings (30 scenarios)"
    for name in ("performance", "convergence", "intervals", "efficiency"):
        assert note in section(html, name), name


def test_a_wide_study_is_summarised_in_the_glance(wide_report):
    _, _, html = wide_report
    glance = section(html, "glance")
    assert "15 DGM settings × 2 sample sizes (n = 5, 20) = 30 scenarios" in glance
    assert "(the first of 15 settings, swept over loc = 0, 1, 2, …, 14 (15 values))" in glance
    assert "<td class=\"text\">mean = 15 values from 0 to 14 · Cramér–Rao bound known</td>" in glance
    assert glance.count("<code>norm(") == 1                              # one row for the DGM


def test_the_figures_across_settings_show_the_stored_values(wide_report):
    folder, store, _ = wide_report
    rows = performance_rows(folder, "loc", "n", "estimator", "measure")
    with closing(open_read_only(store)) as con:
        model = ReportModel.load(con)
    (sweep,) = model.sweeps
    assert (sweep.parameter, sweep.x, sweep.log) == ("loc", tuple(float(k) for k in range(LOCS)), False)
    series = model.series_across(sweep, "coverage", 20, ["mean", "median"])
    assert set(series) == {"mean", "median"}
    for est, d in series.items():
        assert d["x"] == list(sweep.x)
        for key in ("value", "mcse"):     # the CSV has ten significant digits
            assert d[key] == pytest.approx([float(rows[(str(k), "20", est, "coverage")][key])
                                            for k in range(LOCS)], rel=1e-9)


class CountingConnection:
    """A store connection that counts the statements run through it."""

    def __init__(self, con):
        self._con = con
        self.statements = 0

    def execute(self, *args, **kwargs):
        self.statements += 1
        return self._con.execute(*args, **kwargs)

    def __getattr__(self, name):
        return getattr(self._con, name)


def test_the_report_makes_as_many_queries_for_more_scenarios(wide_report, tmp_path):
    _, store, _ = wide_report
    counts = []
    for path in (build_store(tmp_path, wide_study(locs=DETAIL_SETTINGS + 1)), store):
        con = open_read_only(path)
        try:
            counting = CountingConnection(con)
            model = ReportModel.load(counting)
            build_context(model, counting, FigureQueue())
            counts.append((len(model.scenarios), counting.statements))
        finally:
            con.close()
    (few, first), (many, second) = counts
    assert few < many and first == second


def _families(swept: list[dict], dgm: str = "normal", sizes=(10, 50)):
    scenarios = [{"scenario": f"{dgm}{i}-{n}", "dgm": dgm, "n": n, "swept": s, "position": i}
                 for i, s in enumerate(swept) for n in sizes]
    return families_of(scenarios)


def test_small_studies_keep_every_setting_and_wide_ones_a_spread():
    twelve = _families([{"df": k} for k in range(DETAIL_SETTINGS)])
    assert shown_families(twelve) == twelve
    wide = _families([{"df": k} for k in range(40)]) + _families([{"p": 0.1}, {"p": 0.5}], dgm="coin")
    shown = shown_families(wide)
    assert [(f.dgm, json.dumps(f.swept)) for f in shown] == [
        ("normal", '{"df": 0}'), ("normal", '{"df": 20}'), ("normal", '{"df": 39}'),
        ("coin", '{"p": 0.1}'), ("coin", '{"p": 0.5}')]


def test_the_axis_across_settings_is_the_one_varying_parameter():
    (by_df,) = sweeps_of(_families([{"df": k, "scale": 1} for k in (1, 2, 5, 30, 100)]))
    assert (by_df.parameter, by_df.x, by_df.log) == ("df", (1.0, 2.0, 5.0, 30.0, 100.0), True)
    (grid,) = sweeps_of(_families([{"df": d, "scale": s} for d in (3, 9) for s in (1, 2)]))
    assert grid.parameter is None and grid.x == (1.0, 2.0, 3.0, 4.0)
    assert grid.label == "setting of df, scale (number in study order)"
    assert sweeps_of(_families([{"df": 3}])) == []                          # one setting: nothing across


def test_the_wide_page_loads_cleanly_in_a_browser(wide_report, chromium):  # noqa: F811
    folder, _, _ = wide_report
    opens_cleanly_with_figures(chromium, folder / "out" / "report.html", 23)
    assert chromium.evaluate("document.documentElement.scrollWidth <= window.innerWidth")
