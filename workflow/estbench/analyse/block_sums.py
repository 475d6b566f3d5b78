"""Per-seed-block sums of the estimates, taken in one fixed order.

Floating-point addition is not associative: the same numbers summed in another
order can differ in the last bits, and a DuckDB aggregate sums in whatever
order its threads and the store's pages deliver the rows. So every measure is
built from sums taken here, in numpy, in one canonical order:

* DuckDB only sorts: rows come in (seed block, scenario x estimator,
  replicate) order, a total order since a replicate appears once per
  scenario x estimator, streamed in batches cut between a scenario's blocks;
* each seed block's sums run replicate by replicate (``np.bincount``, a
  sequential loop), and deviations are taken about the block's own mean;
* blocks are combined into scenario x estimator totals in block order, with
  the usual update for means and centred sums of squares (Chan, Golub &
  LeVeque 1983, "Algorithms for computing the sample variance: analysis and
  recommendations", The American Statistician 37:242-247; cited from memory).

Every number is then a function of the set of estimates alone, not of ingest
order, batch boundaries, thread count, kill points or executor. Comparisons
of identical estimators are exact: the same operations on the same numbers
give equal variances, a co-moment equal to them, and differences of 0.

Only counts (exact integers, whatever the order) are left to DuckDB's own
aggregates: the rows of each scenario x estimator and, once the mean
estimates are known, the intervals that hold them.
"""

from __future__ import annotations

from dataclasses import dataclass
from collections.abc import Iterator

import numpy as np
import pyarrow as pa

#: Rows per batch streamed from DuckDB (each batch is cut between seed blocks).
BATCH_ROWS = 1 << 18

_GROUPS = "estbench_groups_in"

# Two integer sort keys (DuckDB sorts them much faster than four): seed block and
# group packed in one, then rep. {groups_n} is the number of groups.
_SORTED_ROWS_SQL = """
SELECT g.gid, x.block, x.rep,
       coalesce(x.status = 'ok' AND isfinite(x.estimate), false) AS ok,
       x.estimate, x.se, x.ci_low, x.ci_high, x.p_value
FROM {estimates} AS x
JOIN {groups} AS g ON x.scenario = g.scenario AND x.estimator = g.estimator
ORDER BY x.block * {groups_n} + g.gid, x.rep
"""

# Intervals that hold the group's mean estimate: a count, exact in any order.
_CENTRE_HITS_SQL = """
SELECT g.gid, count(*) AS hits
FROM {estimates} AS x
JOIN {groups} AS g ON x.scenario = g.scenario AND x.estimator = g.estimator
WHERE x.status = 'ok' AND isfinite(x.estimate) AND x.ci_low <= g.centre AND g.centre <= x.ci_high
GROUP BY g.gid
"""


# --------------------------------------------------------------------------- moments

def safe_ratio(a, b):
    """a / b where b > 0, NaN elsewhere (no warnings): means, variances and shares of counts."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(b > 0, a / np.where(b > 0, b, 1), np.nan)


@dataclass(frozen=True)
class Moments:
    """Count, sum and centred sum of squares (M2) of one variable, per row of a grouping."""

    count: np.ndarray
    total: np.ndarray
    m2: np.ndarray

    @property
    def mean(self) -> np.ndarray:
        return safe_ratio(self.total, self.count)

    @property
    def var(self) -> np.ndarray:
        """Sample variance M2/(count − 1); NaN below two values."""
        return safe_ratio(self.m2, self.count - 1.0)

    def take(self, index: np.ndarray) -> Moments:
        return Moments(self.count[index], self.total[index], self.m2[index])


def _sums(seg: np.ndarray, n: int, weights: np.ndarray) -> np.ndarray:
    """Sum of *weights* per segment, accumulated in array order (a sequential loop)."""
    return np.bincount(seg, weights=weights, minlength=n)


def segment_moments(seg: np.ndarray, n: int, x: np.ndarray, valid: np.ndarray,
                    count: np.ndarray | None = None) -> Moments:
    """Moments of *x* over the *valid* rows of each of *n* segments, in row order.

    Invalid rows add exact zeros, so a segment's result depends only on its
    valid values and their order. M2 is taken about the segment's mean.
    *count* (valid rows per segment) may be passed when already known.
    """
    with np.errstate(invalid="ignore"):
        count = _sums(seg, n, valid.astype(float)) if count is None else count
        total = _sums(seg, n, np.where(valid, x, 0.0))
        dev = np.where(valid, x - safe_ratio(total, count)[seg], 0.0)
    return Moments(count, total, _sums(seg, n, dev * dev))


def segment_comoment(seg: np.ndarray, n: int, x: np.ndarray, y: np.ndarray, valid: np.ndarray,
                     mx: Moments, my: Moments) -> np.ndarray:
    """Σ (x − x̄)(y − ȳ) over the *valid* rows of each segment, about the segment means."""
    with np.errstate(invalid="ignore"):
        dx = np.where(valid, x - mx.mean[seg], 0.0)
        dy = np.where(valid, y - my.mean[seg], 0.0)
    return _sums(seg, n, dx * dy)


def combine(group: np.ndarray, n: int, blocks: Moments) -> Moments:
    """Group moments from block moments; rows sorted by group, then block."""
    count, total = _sums(group, n, blocks.count), _sums(group, n, blocks.total)
    with np.errstate(invalid="ignore"):
        dev = np.where(blocks.count > 0, blocks.mean - safe_ratio(total, count)[group], 0.0)
    return Moments(count, total, _sums(group, n, blocks.m2 + blocks.count * dev * dev))


def combine_comoment(group: np.ndarray, n: int, comoment: np.ndarray, bx: Moments, by: Moments,
                     gx: Moments, gy: Moments) -> np.ndarray:
    """Group co-moment from block co-moments of x and y (taken over the same rows)."""
    with np.errstate(invalid="ignore"):
        dx = np.where(bx.count > 0, bx.mean - gx.mean[group], 0.0)
        dy = np.where(by.count > 0, by.mean - gy.mean[group], 0.0)
    return _sums(group, n, comoment + bx.count * dx * dy)


# --------------------------------------------------------------------------- the rows

@dataclass(frozen=True)
class Groups:
    """The scenario x estimator groups that have a truth, in (scenario, estimator) order."""

    scenario: np.ndarray
    estimator: np.ndarray
    truth: np.ndarray
    reference: np.ndarray     #: per group: the group id of its scenario's reference, or −1
    scenario_id: np.ndarray   #: per group: 0, 1, ... by scenario

    @property
    def n(self) -> int:
        return len(self.scenario)


def groups_of(truth: pa.Table, reference: str | None) -> tuple[Groups, pa.Table]:
    """The groups and the Arrow table (scenario, estimator, gid) that joins them to the rows."""
    truth = truth.sort_by([("scenario", "ascending"), ("estimator", "ascending")])
    scenario = np.asarray(truth["scenario"].to_pylist(), object)
    estimator = np.asarray(truth["estimator"].to_pylist(), object)
    gid = np.arange(len(scenario))
    ref_of_scenario = {s: i for i, (s, e) in enumerate(zip(scenario, estimator)) if e == reference}
    ref = np.array([ref_of_scenario.get(s, -1) for s in scenario], np.int64)
    values = truth["truth"].cast(pa.float64()).fill_null(np.nan).to_numpy(zero_copy_only=False)
    table = pa.table({"scenario": truth["scenario"], "estimator": truth["estimator"],
                      "gid": pa.array(gid, pa.int64())})
    starts = np.r_[True, scenario[1:] != scenario[:-1]] if len(scenario) else np.zeros(0, bool)
    return Groups(scenario, estimator, values, ref, np.cumsum(starts) - 1), table


_FLOATS = ("estimate", "se", "ci_low", "ci_high", "p_value")
_NUMERIC = ("gid", "block", "rep", *_FLOATS)


def _columns(batch: pa.RecordBatch) -> dict[str, np.ndarray]:
    out = {name: batch.column(name).to_numpy(zero_copy_only=False) for name in _NUMERIC}
    for name in _FLOATS:
        out[name] = out[name].astype(float)    # NULL arrives as NaN
    out["ok"] = batch.column("ok").to_numpy(zero_copy_only=False).astype(bool)
    return out


def sorted_chunks(con, estimates: str, groups: Groups, groups_table: pa.Table, batch_rows: int | None = None
                  ) -> Iterator[dict[str, np.ndarray]]:
    """The rows in (block, group, rep) order, in chunks of about *batch_rows* rows.

    Chunks are cut only between (block, scenario)s, so each scenario x
    estimator x block, and each estimator's pairs with the reference, is
    complete within one chunk; a chunk is at most a batch plus one scenario's
    block.
    """
    con.register(_GROUPS, groups_table)
    try:
        sql = _SORTED_ROWS_SQL.format(estimates=estimates, groups=_GROUPS, groups_n=max(groups.n, 1))
        carry = None
        for batch in con.sql(sql).to_arrow_reader(batch_rows or BATCH_ROWS):
            if batch.num_rows == 0:
                continue
            cols = _columns(batch)
            if carry is not None:
                cols = {k: np.concatenate([carry[k], v]) for k, v in cols.items()}
            block, sid = cols["block"], groups.scenario_id[cols["gid"]]
            cuts = np.flatnonzero((block[1:] != block[:-1]) | (sid[1:] != sid[:-1])) + 1
            cut = int(cuts[-1]) if len(cuts) else 0
            carry = {k: v[cut:] for k, v in cols.items()}
            if cut:
                yield {k: v[:cut] for k, v in cols.items()}
        if carry is not None and len(carry["block"]):
            yield carry
    finally:
        con.unregister(_GROUPS)


# --------------------------------------------------------------------------- per block

def _single_variables(c: dict, truth: np.ndarray, alpha: float) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """The variables summed per estimator: name -> (values, rows where valid)."""
    ok = c["ok"]
    has_se = ok & ~np.isnan(c["se"])
    has_ci = ok & ~np.isnan(c["ci_low"]) & ~np.isnan(c["ci_high"])
    has_p = ok & ~np.isnan(c["p_value"])
    with np.errstate(invalid="ignore", over="ignore"):   # rows not used may hold inf or NaN
        err = c["estimate"] - truth
        covers = ((c["ci_low"] <= truth) & (truth <= c["ci_high"])).astype(float)
        rejects = (c["p_value"] < alpha).astype(float)
        return {"err": (err, ok), "sqerr": (err * err, ok), "estimate": (c["estimate"], ok),
                "se2": (c["se"] * c["se"], has_se), "estimate_se": (c["estimate"], has_se),
                "covers": (covers, has_ci), "width": (c["ci_high"] - c["ci_low"], has_ci),
                "rejects": (rejects, has_p)}


@dataclass(frozen=True)
class BlockSums:
    """Moments per (group, block) row, rows sorted by group then block."""

    group: np.ndarray
    block: np.ndarray
    rows: np.ndarray                      #: rows of the group in the block, failed ones included
    moments: dict[str, Moments]
    comoments: dict[tuple[str, str], np.ndarray]   #: (x, y) -> Σ (x − x̄)(y − ȳ) about block means

    def sorted(self) -> BlockSums:
        order = np.lexsort((self.block, self.group))
        return BlockSums(self.group[order], self.block[order], self.rows[order],
                         {k: m.take(order) for k, m in self.moments.items()},
                         {k: v[order] for k, v in self.comoments.items()})

    def totals(self, n: int) -> tuple[dict[str, Moments], dict[tuple[str, str], np.ndarray], np.ndarray]:
        """Moments, co-moments and rows of each of *n* groups, combining the blocks in block order."""
        moments = {k: combine(self.group, n, m) for k, m in self.moments.items()}
        comoments = {(x, y): combine_comoment(self.group, n, c, self.moments[x], self.moments[y],
                                              moments[x], moments[y])
                     for (x, y), c in self.comoments.items()}
        return moments, comoments, _sums(self.group, n, self.rows)


def _segments(group: np.ndarray, block: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Segment id of each row (runs of equal group and block) and each segment's first row."""
    starts = np.ones(len(group), bool)
    starts[1:] = (group[1:] != group[:-1]) | (block[1:] != block[:-1])
    return np.cumsum(starts) - 1, np.flatnonzero(starts)


def _moments_of(seg: np.ndarray, n: int, variables: dict[str, tuple[np.ndarray, np.ndarray]]) -> dict[str, Moments]:
    """Moments of each variable per segment; variables sharing a mask share its count."""
    counts = {}
    for _, valid in variables.values():
        if id(valid) not in counts:
            counts[id(valid)] = _sums(seg, n, valid.astype(float))
    return {name: segment_moments(seg, n, x, valid, counts[id(valid)]) for name, (x, valid) in variables.items()}


def _rows_per_segment(seg: np.ndarray, n: int) -> np.ndarray:
    return np.bincount(seg, minlength=n).astype(float)


def _chunk_single(c: dict, groups: Groups, alpha: float) -> BlockSums:
    """Sums of each estimator per block."""
    seg, first = _segments(c["gid"], c["block"])
    n = len(first)
    moments = _moments_of(seg, n, _single_variables(c, groups.truth[c["gid"]], alpha))
    return BlockSums(c["gid"][first], c["block"][first], _rows_per_segment(seg, n), moments, {})


def _reference_rows(c: dict, groups: Groups) -> np.ndarray:
    """For each row, the index of the reference's row of the same scenario, block and rep; −1 if none.

    Rows are in (block, group, rep) order, so segments (runs of one block and
    group) are sorted by (block, group) and the rows in each by rep.
    """
    ref_gid = groups.reference[c["gid"]]
    at = np.flatnonzero(c["gid"] == ref_gid)
    if len(at) == 0:
        return np.full(len(ref_gid), -1)
    seg, first = _segments(c["gid"], c["block"])
    block0 = c["block"].min()
    seg_key = (c["block"][first] - block0) * groups.n + c["gid"][first]       # ascending
    wanted = (c["block"] - block0) * groups.n + ref_gid
    ref_seg = np.minimum(np.searchsorted(seg_key, wanted), len(first) - 1)
    has_seg = (seg_key[ref_seg] == wanted) & (ref_gid >= 0)
    rep = c["rep"] - c["rep"].min()
    span = int(rep.max()) + 1
    ref_key = seg[at] * span + rep[at]                                         # ascending
    key = ref_seg * span + rep
    pos = np.minimum(np.searchsorted(ref_key, key), len(at) - 1)
    return np.where(has_seg & (ref_key[pos] == key), at[pos], -1)


def _chunk_paired(c: dict, groups: Groups, alpha: float) -> BlockSums:
    """Sums of each estimator paired with the reference on the same (scenario, rep)."""
    partner = _reference_rows(c, groups)
    ref_gid = groups.reference[c["gid"]]
    rows = np.flatnonzero((ref_gid >= 0) & (c["gid"] != ref_gid))
    matched = partner[rows] >= 0
    at = np.where(matched, partner[rows], rows)    # an unmatched row is never used as a partner
    j = _single_variables({k: v[rows] for k, v in c.items()}, groups.truth[c["gid"][rows]], alpha)
    r = _single_variables({k: v[at] for k, v in c.items()}, groups.truth[ref_gid[rows]], alpha)
    both = j["err"][1] & r["err"][1] & matched
    both_ci = both & j["covers"][1] & r["covers"][1]
    err_j, err_r = j["err"][0], r["err"][0]
    sq_j, sq_r = j["sqerr"][0], r["sqerr"][0]
    est_j, est_r = j["estimate"][0], r["estimate"][0]
    seg, first = _segments(c["gid"][rows], c["block"][rows])
    n = len(first)
    with np.errstate(invalid="ignore"):    # rows not used may hold inf
        variables = {"est_j": (est_j, both), "est_r": (est_r, both), "sq_j": (sq_j, both), "sq_r": (sq_r, both),
                     "dbias": (err_j - err_r, both), "dmse": (sq_j - sq_r, both),
                     "dcover": (j["covers"][0] - r["covers"][0], both_ci),
                     "matched": (np.ones(len(rows)), matched)}
    moments = _moments_of(seg, n, variables)
    comoments = {(x, y): segment_comoment(seg, n, variables[x][0], variables[y][0], both, moments[x], moments[y])
                 for x, y in (("est_j", "est_r"), ("sq_j", "sq_r"))}
    return BlockSums(c["gid"][rows][first], c["block"][rows][first], _rows_per_segment(seg, n),
                     moments, comoments)


def _joined(parts: list[BlockSums]) -> BlockSums:
    first = parts[0]
    return BlockSums(np.concatenate([p.group for p in parts]), np.concatenate([p.block for p in parts]),
                     np.concatenate([p.rows for p in parts]),
                     {k: Moments(*(np.concatenate([getattr(p.moments[k], f) for p in parts])
                                   for f in ("count", "total", "m2"))) for k in first.moments},
                     {k: np.concatenate([p.comoments[k] for p in parts]) for k in first.comoments}).sorted()


@dataclass(frozen=True)
class Sums:
    """Block sums of every scenario x estimator, and of each estimator paired with the reference."""

    groups: Groups
    single: BlockSums
    paired: BlockSums | None     #: None without a reference


def block_sums(con, estimates: str, truth: pa.Table, *, reference: str | None, alpha: float,
               batch_rows: int | None = None) -> Sums:
    """One sorted pass over *estimates* (a relation name on *con*); see the module docstring.

    *truth* is an Arrow table (scenario, estimator, truth) with one row per
    group; rows of other groups are left out. *alpha* is the rejection
    threshold on p-values.
    """
    groups, table = groups_of(truth, reference)
    single, paired = [], []
    for chunk in _at_least_one(sorted_chunks(con, estimates, groups, table, batch_rows)):
        single.append(_chunk_single(chunk, groups, alpha))
        if reference is not None:
            paired.append(_chunk_paired(chunk, groups, alpha))
    return Sums(groups, _joined(single), _joined(paired) if reference is not None else None)


def _at_least_one(chunks: Iterator[dict]) -> Iterator[dict]:
    """The chunks, or one empty chunk when there are no rows (so every sum exists, with no rows)."""
    empty = True
    for chunk in chunks:
        empty = False
        yield chunk
    if empty:
        yield {name: np.zeros(0, float if name in _FLOATS else np.int64) for name in _NUMERIC} | \
            {"ok": np.zeros(0, bool)}


def centre_hits(con, estimates: str, groups: Groups, centre: np.ndarray) -> np.ndarray:
    """Per group, how many 'ok' intervals hold *centre* (a count: exact in any order)."""
    table = pa.table({"scenario": pa.array(groups.scenario.tolist(), pa.string()),
                      "estimator": pa.array(groups.estimator.tolist(), pa.string()),
                      "gid": pa.array(np.arange(groups.n), pa.int64()),
                      "centre": pa.array(centre, pa.float64(), from_pandas=True)})
    con.register(_GROUPS, table)
    try:
        rows = con.execute(_CENTRE_HITS_SQL.format(estimates=estimates, groups=_GROUPS)).fetchall()
    finally:
        con.unregister(_GROUPS)
    hits = np.zeros(groups.n)
    for gid, k in rows:
        hits[gid] = k
    return hits
