"""Every query the report makes, against a read-only connection to the store.

Queries over ``estimates`` (possibly 10^7 rows and more) always aggregate in
DuckDB and return small results: counts per histogram bin, shares per
scenario x estimator, sums of paired differences, or a subsample of ranks
chosen in SQL. Small inputs the report computes (bin grids, tolerances, the
pairs to compare) are registered as Arrow tables for the duration of a query.
"""

from __future__ import annotations

import contextlib
import json

import pyarrow as pa

from estbench.analyse.measures import MEASURES

#: Rows of an estimate the measures use.
_OK = "x.status = 'ok' AND isfinite(x.estimate)"


def fetch_dicts(con, sql: str, params=None) -> list[dict]:
    """All rows of a (small) query as dicts."""
    cur = con.execute(sql, params or [])
    names = [d[0] for d in cur.description]
    return [dict(zip(names, r)) for r in cur.fetchall()]


@contextlib.contextmanager
def registered(con, name: str, columns: dict):
    """Make *columns* (name -> list) queryable as *name* while the block runs."""
    con.register(name, pa.table(columns))
    try:
        yield name
    finally:
        con.unregister(name)


def study(con) -> dict:
    return fetch_dicts(con, "SELECT * FROM study")[0]


def scenarios(con) -> list[dict]:
    rows = fetch_dicts(con, "SELECT * FROM scenarios ORDER BY position")
    for r in rows:
        r["spec"], r["swept"] = json.loads(r["spec"]), json.loads(r["swept"])
    return rows


def estimators(con) -> list[dict]:
    rows = fetch_dicts(con, "SELECT * FROM estimators ORDER BY position")
    for r in rows:
        r["args"] = json.loads(r["args"]) if r["args"] else {}
    return rows


def truths(con) -> list[dict]:
    """True value, its MCSE and the Cramér–Rao bound of every estimand an estimator targets."""
    return fetch_dicts(con, """
        SELECT t.scenario, t.estimand, t.value, t.mcse, t.crb FROM truths t
        WHERE t.estimand IN (SELECT target FROM estimators)
        ORDER BY t.scenario, t.estimand""")


def performance(con) -> list[dict]:
    """The performance table with each scenario's DGM, n and swept values, in
    scenario, estimator and catalogue order."""
    rows = fetch_dicts(con, """
        SELECT p.scenario, s.dgm, s.n, s.swept, p.estimator, e.target, p.measure, p.value, p.mcse,
               p.n_ok, p.n_failed, s.position AS spos, e.position AS epos
        FROM performance p
        JOIN scenarios s USING (scenario)
        JOIN estimators e USING (estimator)
        ORDER BY s.position, e.position""")
    order = {m.name: i for i, m in enumerate(MEASURES)}
    rows.sort(key=lambda r: (r["spos"], r["epos"], order.get(r["measure"], len(order))))
    swept = {text: json.loads(text) for text in {r["swept"] for r in rows}}    # one parse per scenario
    for r in rows:
        r["swept"] = swept[r["swept"]]
    return rows


def checks(con) -> list[dict]:
    rows = fetch_dicts(con, """
        SELECT c.*, s.dgm, s.n, s.swept, s.position AS spos FROM checks c JOIN scenarios s USING (scenario)
        ORDER BY s.position, c.estimator, c.check, c.measure""")
    for r in rows:
        r["swept"] = json.loads(r["swept"])
    return rows


def replicate_counts(con) -> list[dict]:
    """Rows and failed replicates per scenario x estimator (one grouped pass)."""
    return fetch_dicts(con, """
        SELECT scenario, estimator, count(*) AS rows, count(*) FILTER (WHERE status <> 'ok') AS failed
        FROM estimates GROUP BY ALL""")


_FAILURE_GROUPS = {"scenario": ("scenario", "estimator"), "estimator": ("estimator",)}


def failure_messages(con, top: int, per: str) -> list[dict]:
    """The *top* most common messages of the failed replicates, per
    scenario x estimator (*per* = ``"scenario"``) or per estimator over all
    scenarios (*per* = ``"estimator"``).

    ``kinds`` counts the distinct messages; a replicate without a message is
    listed under its status.
    """
    keys = ", ".join(_FAILURE_GROUPS[per])
    return fetch_dicts(con, f"""
        WITH f AS (SELECT {keys}, coalesce(message, '(' || status || ', no message)') AS message,
                          count(*) AS k
                   FROM estimates WHERE status <> 'ok' GROUP BY ALL),
        ranked AS (SELECT *, row_number() OVER (PARTITION BY {keys} ORDER BY k DESC, message) AS r,
                          count(*) OVER (PARTITION BY {keys}) AS kinds, sum(k) OVER (PARTITION BY {keys}) AS failed
                   FROM f)
        SELECT {keys}, any_value(kinds) AS kinds, any_value(failed) AS failed,
               list(struct_pack(message := message, count := k) ORDER BY r) AS messages
        FROM ranked WHERE r <= $top GROUP BY {keys}""", {"top": top})


def provenance_summary(con) -> dict:
    return fetch_dicts(con, """
        SELECT count(*) AS shards, sum(seconds) AS seconds, min(created) AS first,
               max(created) AS last FROM provenance""")[0]


def environments(con) -> list[dict]:
    """Each distinct set of versions the shards ran with, and how many shards did."""
    return fetch_dicts(con, """
        SELECT estbench, numpy, scipy, pyarrow, python, count(*) AS shards, sum(seconds) AS seconds
        FROM provenance GROUP BY ALL ORDER BY shards DESC, estbench, numpy, scipy, pyarrow, python""")


def code_hashes(con) -> list[dict]:
    """Per estimator: its code hash now, and how many of its shards ran that code."""
    return fetch_dicts(con, """
        SELECT e.estimator, e.code_hash, count(p.path) AS shards,
               count(p.path) FILTER (WHERE p.code_hash = e.code_hash) AS current,
               string_agg(DISTINCT p.code_hash, ', ' ORDER BY p.code_hash)
                   FILTER (WHERE p.code_hash <> e.code_hash) AS others
        FROM estimators e LEFT JOIN shards s USING (estimator) LEFT JOIN provenance p USING (path)
        GROUP BY e.estimator, e.code_hash, e.position ORDER BY e.position""")


def shard_list(con, limit: int) -> tuple[list[dict], int]:
    """The first *limit* shards (scenario, estimator, block order) and the total count."""
    total = con.execute("SELECT count(*) FROM shards").fetchone()[0]
    rows = fetch_dicts(con, """
        SELECT s.path, s.rows, p.seconds, p.created
        FROM shards s LEFT JOIN provenance p USING (path)
        LEFT JOIN scenarios c USING (scenario) LEFT JOIN estimators e USING (estimator)
        ORDER BY c.position, e.position, s.first_block LIMIT $limit""", {"limit": limit})
    return rows, total


# ------------------------------------------------------------------ over the estimates

def error_quantiles(con, keys: dict, low: float, high: float, every: int) -> list[dict]:
    """Quantiles *low* and *high* of the error θ̂ − θ per scenario x estimand,
    pooled over the estimators of that estimand, from every *every*-th
    replicate (exact quantiles of a fixed subsample: cheap, and the same on
    every render).

    *keys* has columns scenario, estimator, target, truth.
    """
    with registered(con, "report_keys", keys):
        return fetch_dicts(con, f"""
            SELECT k.scenario, k.target, quantile_cont(x.estimate - k.truth, {float(low)!r}) AS lo,
                   quantile_cont(x.estimate - k.truth, {float(high)!r}) AS hi
            FROM estimates x JOIN report_keys k ON x.scenario = k.scenario AND x.estimator = k.estimator
            WHERE {_OK} AND x.rep % $every = 0
            GROUP BY k.scenario, k.target""", {"every": int(every)})


def error_histograms(con, keys: dict) -> list[dict]:
    """Counts of θ̂ − θ per bin and of |θ̂ − θ| > tolerance, per scenario x estimator,
    in one pass.

    *keys* has columns scenario, estimator, truth, lo, width, bins, tolerance
    (NaN: none). Bin −1 counts the errors below ``lo``, bin ``bins`` those
    above the last edge; ``beyond`` counts the bin's errors past the tolerance.
    """
    with registered(con, "report_keys", keys):
        return fetch_dicts(con, f"""
            SELECT k.scenario, k.estimator,
                   least(greatest(floor((x.estimate - k.truth - k.lo) / k.width), -1), k.bins)::BIGINT AS bin,
                   count(*) AS k,
                   count(*) FILTER (WHERE abs(x.estimate - k.truth) > k.tolerance) AS beyond
            FROM estimates x JOIN report_keys k ON x.scenario = k.scenario AND x.estimator = k.estimator
            WHERE {_OK}
            GROUP BY ALL ORDER BY ALL""")


_COVERS = ("CASE WHEN {x}.lo IS NULL OR {x}.hi IS NULL THEN NULL "
           "WHEN {x}.lo <= k.truth AND k.truth <= {x}.hi THEN 1.0 ELSE 0.0 END")


#: Per-replicate contribution of estimator {x} to each ranked measure (see
#: ``report_stats.RANKINGS``); the paired difference is b's minus a's.
_CONTRIBUTIONS = {
    "bias": "k.sb_{x} * ({x}.x - k.truth)",
    "empirical_se": "({x}.x - k.m_{x}) ** 2",
    "rmse": "({x}.x - k.truth) ** 2",
    "coverage": "k.sc_{x} * (" + _COVERS + " - k.level)",
}

#: Columns of the pairs table of :func:`paired_differences`.
PAIR_COLUMNS = ("pair", "scenario", "est_a", "est_b", "truth", "level", "sb_a", "sb_b", "sc_a", "sc_b",
                "m_a", "m_b")


def paired_differences(con, pairs: dict, measures) -> list[dict]:
    """Count, mean and sd of b's minus a's per-replicate contribution to each of
    *measures*, per pair of estimators, over the replicates where both are 'ok'
    (the same (scenario, rep): the same dataset). One query for every pair.

    *pairs* has the columns PAIR_COLUMNS: ``pair`` (a distinct integer id),
    ``scenario``, the estimators ``est_a`` and ``est_b``, ``truth``, ``level``
    and, for a and b, ``sb_*`` (signs of the bias), ``sc_*`` (signs of
    coverage − level) and ``m_*`` (mean estimates). Returns one dict per pair
    that has paired replicates (keys ``pair`` and ``<measure>_pairs``,
    ``_mean``, ``_sd``), by pair id. The sums of each pair run in rep order,
    so the result does not depend on how rows reached the store.
    """
    side = """SELECT k.pair, x.rep, x.estimate AS x, x.ci_low AS lo, x.ci_high AS hi
              FROM estimates x JOIN report_pairs k ON x.scenario = k.scenario AND x.estimator = k.{who}
              WHERE x.status = 'ok' AND isfinite(x.estimate)"""
    diffs = {m: f"{_CONTRIBUTIONS[m].format(x='b')} - ({_CONTRIBUTIONS[m].format(x='a')})" for m in measures}
    # ORDER BY rep: sums in one fixed order, so the result is the same on every render
    aggregates = ", ".join(f"count({d}) AS {m}_pairs, avg({d} ORDER BY rep) AS {m}_mean, "
                           f"stddev_samp({d} ORDER BY rep) AS {m}_sd" for m, d in diffs.items())
    with registered(con, "report_pairs", {c: pairs[c] for c in PAIR_COLUMNS}):
        return fetch_dicts(con, f"""
            WITH a AS ({side.format(who="est_a")}), b AS ({side.format(who="est_b")})
            SELECT k.pair, {aggregates} FROM a JOIN b USING (pair, rep) JOIN report_pairs k USING (pair)
            GROUP BY k.pair ORDER BY k.pair""")


def zip_sample(con, scenario: str, lines: int) -> list[dict]:
    """Intervals of one scenario ranked by |z|, about *lines* per estimator.

    |z| = |θ̂ − θ|/SE where the estimator gives an SE; otherwise the distance
    to θ over the half-width of the interval on θ's side (an interval covers
    exactly when this is ≤ 1; for a symmetric interval the order is that of
    |z|). Ranks are taken over every replicate with an interval; every k-th
    rank is kept, k = ⌈replicates/lines⌉, so the sample keeps the shares.
    """
    return fetch_dicts(con, f"""
        WITH z AS (
            SELECT x.estimator, x.rep, x.estimate, x.ci_low, x.ci_high, t.truth,
                   (x.ci_low <= t.truth AND t.truth <= x.ci_high) AS covers,
                   CASE WHEN x.se > 0 THEN abs(x.estimate - t.truth) / x.se
                        WHEN t.truth >= x.estimate THEN (t.truth - x.estimate) / nullif(x.ci_high - x.estimate, 0)
                        ELSE (x.estimate - t.truth) / nullif(x.estimate - x.ci_low, 0) END AS zstat,
                   x.se > 0 AS has_se
            FROM estimates x JOIN truth t USING (scenario, estimator)
            WHERE x.scenario = $scenario AND {_OK} AND x.ci_low IS NOT NULL AND x.ci_high IS NOT NULL),
        ranked AS (
            SELECT *, row_number() OVER w AS rank, count(*) OVER (PARTITION BY estimator) AS total
            FROM z WINDOW w AS (PARTITION BY estimator ORDER BY zstat NULLS LAST, rep))
        SELECT r.estimator, r.rank, r.total, r.estimate, r.ci_low, r.ci_high, r.truth, r.covers, r.has_se
        FROM ranked r JOIN estimators e USING (estimator)
        WHERE (r.rank - 1) % CAST(ceil(r.total / $lines) AS BIGINT) = 0
        ORDER BY e.position, r.rank""", {"scenario": scenario, "lines": float(lines)})
