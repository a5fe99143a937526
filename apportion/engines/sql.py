"""The aggregation plan shared by the SQL engines: every pass a fit makes over the rows, written as
one SQL aggregation whose result is a small table (histograms, per-leaf and per-cell sums).

A backend (DuckDB, Spark) supplies four things: how to quote a name and a string, how to run a
query into a pyarrow table, and how to keep the working table `work` (one row per readout row:
role `r`, arm code `a`, bin codes `b0..`, metric components `c0..`). Everything else, and so the
numbers, is the same text for both.

Longer than most modules (about 480 lines) on purpose: splitting the passes apart would put the
one SQL text both backends share into several files that must stay in step.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import replace
from typing import Any

import numpy as np
import pyarrow as pa

from apportion.stats.binning import FeatureBins
from apportion.stats.estimates import CellMoments
from apportion.stats.partition import Partition
from apportion.stats.table import FeatureSpec, MetricSpec
from apportion.stats.tree import LevelHistogram, Tree

from .dataset import ReadoutDataset


def num(x: float) -> str:
    """A float64 literal that reads back to the same bits in both dialects: 17 significant digits
    in exponent form (a literal with an exponent is a DOUBLE in DuckDB and Spark SQL alike)."""
    x = float(x)
    if not np.isfinite(x):
        return (
            f"CAST('{'NaN' if np.isnan(x) else ('Infinity' if x > 0 else '-Infinity')}' AS DOUBLE)"
        )
    return f"{x:.16e}"


DISTINCT_CAP = 100_000  # distinct values of a feature whose counts come back in one table
BUCKETS = 1 << 14  # equal-width buckets that narrow down a feature with more distinct values


def inverted_cdf_positions(n: int, probs: np.ndarray) -> np.ndarray:
    """The 0-based sorted positions numpy's `quantile(method="inverted_cdf")` takes for `probs`
    of `n` values: index = n p - 1, rounded up unless it is whole, clipped to [0, n - 1] (numpy's
    `_inverted_cdf` and `_discrete_interpolation_to_boundaries`, with the same float64 steps)."""
    index = n * np.asarray(probs, dtype=np.float64) - 1
    previous = np.floor(index)
    pos = np.where(index - previous == 0, previous, previous + 1).astype(np.int64)
    return np.clip(pos, 0, n - 1)


class SqlEngine:
    """Implements `apportion.stats.pushdown.RowEngine` on top of a SQL backend."""

    name = "sql"
    union_width = 1  # features counted in one query (Spark: all, its queries cost a fixed delay)

    def __init__(self, dataset: ReadoutDataset) -> None:
        self.dataset = dataset
        self.n = dataset.n_rows
        self.arm_keys = dataset.arm_keys
        self.design_shares = dataset.design_shares
        self.features: tuple[FeatureSpec, ...] = ()
        self.metrics: tuple[MetricSpec, ...] = dataset.metrics
        self.components = dataset.components
        self._bins: FeatureBins | None = None
        self._y: list[str] = []
        self.features = self._resolve_levels(dataset.features)

    # ---- backend hooks -----------------------------------------------------------------------
    def ident(self, name: str) -> str:
        raise NotImplementedError

    def text(self, value: str) -> str:
        raise NotImplementedError

    def query(self, sql: str) -> pa.Table:
        raise NotImplementedError

    def store_work(self, select: str, role: np.ndarray) -> None:
        """Keep `work` = the columns of `select` (over the source view `src`) with column `r`
        holding `role[i]` for the i-th readout row."""
        raise NotImplementedError

    def arm_codes(self) -> np.ndarray:
        raise NotImplementedError

    def close(self) -> None:
        pass

    # ---- levels and the raw columns ------------------------------------------------------------
    def _resolve_levels(self, features: tuple[FeatureSpec, ...]) -> tuple[FeatureSpec, ...]:
        """Undeclared categorical levels are the sorted distinct non-empty values (as ingest)."""
        out = []
        for f in features:
            if f.kind == "categorical" and not f.levels:
                col = self.col(f.key)
                t = self.query(f"SELECT DISTINCT CAST({col} AS STRING) AS v FROM src "
                               f"WHERE {col} IS NOT NULL AND CAST({col} AS STRING) <> ''")  # fmt: skip
                f = replace(f, levels=tuple(sorted(t.column("v").to_pylist())))
            out.append(f)
        return tuple(out)

    def col(self, name: str) -> str:
        """The quoted Parquet column of a feature key or a metric component name."""
        return self.ident(self.dataset.column(name))

    def arm_case(self) -> str:
        if self.dataset.arm_coded:
            return f"CAST({self.ident('arm')} AS INT)"
        whens = " ".join(f"WHEN {self.text(a)} THEN {j}" for j, a in enumerate(self.arm_keys))
        return f"CASE CAST({self.ident('arm')} AS STRING) {whens} END"

    def quantiles(
        self, keys: list[str], probs: np.ndarray
    ) -> dict[str, tuple[np.ndarray, float] | None]:
        """Per numeric feature of `keys`, numpy's inverted-CDF quantiles at `probs`
        (`np.quantile(method="inverted_cdf")` over the non-missing values) and the minimum; None
        for a feature whose values are all missing. Exact, not approximate.

        Computed from GROUP BY counts, never from a column sorted whole, so the engine's memory
        stays bounded (an aggregation spills to disk) and only small tables come back: one scan
        gives each feature's non-missing count, minimum, maximum and approximate number of
        distinct values; a feature with at most `DISTINCT_CAP` distinct values then sends its
        (value, count) pairs, and the sorted position numpy picks for each probability
        (`inverted_cdf_positions`) is read off their cumulative counts. A feature with more
        distinct values is counted first in `BUCKETS` equal-width buckets between its minimum and
        maximum, and then only the buckets holding a wanted position send their (value, count)
        pairs."""
        if not keys:
            return {}
        probs = np.asarray(probs, dtype=np.float64)
        xs = [f"CASE WHEN isnan(CAST({self.col(k)} AS DOUBLE)) THEN NULL "
              f"ELSE CAST({self.col(k)} AS DOUBLE) END" for k in keys]  # fmt: skip
        head = ", ".join(f"COUNT(x{i}) AS n{i}, MIN(x{i}) AS lo{i}, MAX(x{i}) AS hi{i}, "
                         f"approx_count_distinct(x{i}) AS d{i}" for i in range(len(keys)))  # fmt: skip
        cols = ", ".join(f"{x} AS x{i}" for i, x in enumerate(xs))
        row = self.query(f"SELECT {head} FROM (SELECT {cols} FROM src) AS vals").to_pylist()[0]
        out: dict[str, tuple[np.ndarray, float] | None] = {k: None for k in keys}
        few: list[int] = []
        many: list[int] = []
        for i in range(len(keys)):
            if int(row[f"n{i}"] or 0) > 0:
                (few if int(row[f"d{i}"]) <= DISTINCT_CAP else many).append(i)
        wanted = {i: inverted_cdf_positions(int(row[f"n{i}"]), probs) + 1 for i in few + many}

        def counted(parts: list[str]) -> dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]]:
            """(bucket, value, count) per feature, sorted, from `SELECT f, b, v` parts (grouped
            `self.union_width` features to a query)."""
            w = max(1, self.union_width)
            t = pa.concat_tables([
                self.query(f"SELECT f, b, v, COUNT(*) AS cnt FROM ({' UNION ALL '.join(parts[g : g + w])}) "
                           "AS vals WHERE v IS NOT NULL GROUP BY f, b, v")
                for g in range(0, len(parts), w)
            ])  # fmt: skip
            f, bk, v, c = _ints(t, "f"), _ints(t, "b"), _floats(t, "v"), _ints(t, "cnt")
            order = np.lexsort((v, bk, f))
            f, bk, v, c = f[order], bk[order], v[order], c[order]
            return {int(i): (bk[f == i], v[f == i], c[f == i]) for i in np.unique(f)}

        def pick(
            v: np.ndarray, c: np.ndarray, before: np.ndarray | np.integer[Any], k: np.ndarray
        ) -> np.ndarray:
            """The value at 1-based position k, given the count of values before `v`'s first."""
            return v[np.searchsorted(before + np.cumsum(c), k, side="left")]

        if few:
            by_f = counted([f"SELECT {i} AS f, 0 AS b, {xs[i]} AS v FROM src" for i in few])
            for i in few:
                _, v, c = by_f[i]
                out[keys[i]] = (pick(v, c, np.zeros(1, np.int64), wanted[i]), float(row[f"lo{i}"]))
        if many:
            bucket = {}
            for i in many:
                lo, hi = float(row[f"lo{i}"]), float(row[f"hi{i}"])
                width = (hi - lo) / BUCKETS
                bucket[i] = (f"LEAST(GREATEST(CAST(FLOOR(({xs[i]} - {num(lo)}) / {num(width)}) "
                             f"AS BIGINT), 0), {BUCKETS - 1})")  # fmt: skip
            t = self.query(" UNION ALL ".join(
                f"SELECT {i} AS f, b, COUNT(*) AS cnt FROM (SELECT {bucket[i]} AS b FROM src "
                f"WHERE {xs[i]} IS NOT NULL) AS bs GROUP BY b" for i in many))  # fmt: skip
            f, bk, c = _ints(t, "f"), _ints(t, "b"), _ints(t, "cnt")
            need: dict[int, tuple[np.ndarray, np.ndarray]] = {}
            parts = []
            for i in many:
                order = np.argsort(bk[f == i])
                b_i, c_i = bk[f == i][order], c[f == i][order]
                at = np.searchsorted(np.cumsum(c_i), wanted[i], side="left")  # bucket of each k
                need[i] = (b_i[at], (np.cumsum(c_i) - c_i)[at])  # its bucket, rows before it
                sel = ", ".join(str(int(x)) for x in np.unique(b_i[at]))
                parts.append(f"SELECT {i} AS f, {bucket[i]} AS b, {xs[i]} AS v FROM src "
                             f"WHERE {bucket[i]} IN ({sel})")  # fmt: skip
            by_f = counted(parts)
            for i in many:
                bk_i, v, c = by_f[i]
                q = np.empty(probs.size)
                for j, (b_j, before) in enumerate(zip(*need[i], strict=True)):
                    in_b = bk_i == b_j
                    q[j] = pick(v[in_b], c[in_b], np.int64(before), wanted[i][j : j + 1])[0]
                out[keys[i]] = (q, float(row[f"lo{i}"]))
        return out

    def non_finite(self) -> dict[str, int]:
        parts = []
        for i, c in enumerate(self.components):
            x = f"CAST({self.col(c)} AS DOUBLE)"
            parts.append(f"SUM(CASE WHEN {x} IS NULL OR isnan({x}) OR {x} IN "
                         f"({num(np.inf)}, {num(-np.inf)}) THEN 1 ELSE 0 END) AS n{i}")  # fmt: skip
        if not parts:
            return {}
        row = self.query(f"SELECT {', '.join(parts)} FROM src").to_pylist()[0]
        return {c: int(row[f"n{i}"] or 0) for i, c in enumerate(self.components)}

    # ---- the working table ---------------------------------------------------------------------
    def load(self, bins: FeatureBins, role: np.ndarray) -> None:
        cols = [f"{self.arm_case()} AS a"]
        for f, spec in enumerate(bins.features):
            small = "TINYINT" if int(bins.n_bins[f]) <= 127 else "SMALLINT"
            cols.append(f"CAST({self._bin_expr(spec, bins, f)} AS {small}) AS b{f}")
        for i, c in enumerate(self.components):
            cols.append(f"CAST({self.col(c)} AS DOUBLE) AS c{i}")
        self.store_work(", ".join(cols), np.asarray(role, dtype=np.int8))
        self._bins = bins
        self._y = []

    def _bin_expr(self, spec: FeatureSpec, bins: FeatureBins, f: int) -> str:
        """`binning.bin_features`' code: the number of thresholds <= x (a binary search as nested
        CASE), categorical level codes, and the last code for missing values."""
        miss = int(bins.n_bins[f]) - 1
        col = self.col(spec.key)
        if spec.kind == "categorical":
            whens = " ".join(f"WHEN {self.text(v)} THEN {i}" for i, v in enumerate(spec.levels))
            return f"CASE CAST({col} AS STRING) {whens} ELSE {miss} END" if whens else str(miss)
        thr = bins.thresholds[f]
        assert thr is not None
        x = f"CAST({col} AS DOUBLE)"

        def search(lo: int, hi: int) -> str:  # the code is in [lo, hi]
            if lo == hi:
                return str(lo)
            mid = (lo + hi + 1) // 2
            return f"CASE WHEN {x} >= {num(thr[mid - 1])} THEN {search(mid, hi)} ELSE {search(lo, mid - 1)} END"

        return f"CASE WHEN {x} IS NULL OR isnan({x}) THEN {miss} ELSE {search(0, thr.size)} END"

    def standardize(self, roles: tuple[int, ...]) -> None:
        """`honest.criterion_outcomes`: a ratio metric's linearized value (num - R den) / mu_den
        with R and mu_den of the rows of `roles`, then every metric centred and scaled by its mean
        and (population) standard deviation there."""
        where = f"r IN ({', '.join(map(str, roles))})"
        raw: list[str] = []
        ratio_parts = []
        for k, m in enumerate(self.metrics):
            if m.kind == "ratio":
                a, b = (
                    self.components.index(m.ratio_columns[0]),
                    self.components.index(m.ratio_columns[1]),
                )
                ratio_parts.append(f"SUM(c{a}) AS sn{k}, SUM(c{b}) AS sd{k}, AVG(c{b}) AS md{k}")
        consts = self.query(f"SELECT {', '.join(ratio_parts)} FROM work WHERE {where}").to_pylist()[0] if ratio_parts else {}  # fmt: skip
        for k, m in enumerate(self.metrics):
            if m.kind == "ratio":
                a, b = (
                    self.components.index(m.ratio_columns[0]),
                    self.components.index(m.ratio_columns[1]),
                )
                r_root = consts[f"sn{k}"] / consts[f"sd{k}"]
                raw.append(f"((c{a} - {num(r_root)} * c{b}) / {num(consts[f'md{k}'])})")
            else:
                raw.append(f"c{self.components.index(m.key)}")
        stats = ", ".join(f"AVG({e}) AS m{k}, STDDEV_POP({e}) AS s{k}" for k, e in enumerate(raw))
        row = self.query(f"SELECT {stats} FROM work WHERE {where}").to_pylist()[0]
        self._y = []
        for k, e in enumerate(raw):
            sd = row[f"s{k}"] or 0.0
            self._y.append(f"(({e} - {num(row[f'm{k}'])}) / {num(sd if sd > 0 else 1.0)})")

    # ---- routing --------------------------------------------------------------------------------
    def route_expr(self, tree: Tree, value_of_leaf: Callable[[int], object]) -> str:
        """SQL for `value_of_leaf(leaf)` of the leaf each row reaches in `tree` (over `b0..`);
        a branch whose leaves all give the same value is not expanded."""

        def walk(node: int) -> tuple[str, set[str]]:
            if tree.feature[node] < 0:
                v = str(value_of_leaf(node))
                return v, {v}
            lk = tree.lookup[node]
            assert lk is not None
            left, lv = walk(tree.left[node])
            right, rv = walk(tree.right[node])
            if lv == rv and len(lv) == 1:
                return left, lv
            cond = _code_set(f"b{tree.feature[node]}", np.flatnonzero(lk))
            return f"(CASE WHEN {cond} THEN {left} ELSE {right} END)", lv | rv

        return walk(0)[0]

    # ---- aggregations ---------------------------------------------------------------------------
    def histograms(self, s_roles: tuple[int, ...], n_arms: int) -> _SqlLevels:
        return _SqlLevels(self, s_roles, n_arms)

    def _sums(self) -> str:
        return ", ".join(f"SUM({y}) AS s{k}, SUM({y} * {y}) AS q{k}" for k, y in enumerate(self._y))

    def leaf_stats(
        self, tree: Tree, roles: tuple[int, ...], n_arms: int
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        L, J, K = len(tree), n_arms, len(self._y)
        node = self.route_expr(tree, lambda leaf: leaf)
        t = self.query(f"SELECT {node} AS g, a, COUNT(*) AS n, {self._sums()} FROM work "
                       f"WHERE r IN ({', '.join(map(str, roles))}) GROUP BY 1, 2")  # fmt: skip
        n, s, q = np.zeros((L, J), dtype=np.int64), np.zeros((L, J, K)), np.zeros((L, J, K))
        g, a = _ints(t, "g"), _ints(t, "a")
        n[g, a] = _ints(t, "n")
        for k in range(K):
            s[g, a, k] = _floats(t, f"s{k}")
            q[g, a, k] = _floats(t, f"q{k}")
        return n, s, q

    def cohort_counts(self, tree: Tree, cohort_of_node: np.ndarray, n_cohorts: int) -> np.ndarray:
        cohort = self.route_expr(tree, lambda leaf: int(cohort_of_node[leaf]))
        t = self.query(f"SELECT {cohort} AS c, COUNT(*) AS n FROM work GROUP BY 1")
        out = np.zeros(n_cohorts, dtype=np.int64)
        out[_ints(t, "c")] = _ints(t, "n")
        return out

    def cell_moments(self, tree: Tree, cohort_of_node: np.ndarray, n_cohorts: int,
                     roles: tuple[int, ...]) -> CellMoments:  # fmt: skip
        """`estimates.cell_moments` per (cohort, arm) on the working rows of `roles`."""
        cohort = self.route_expr(tree, lambda leaf: int(cohort_of_node[leaf]))
        cs = ", ".join(f"c{i}" for i in range(len(self.components)))
        return self._moments(f"SELECT {cohort} AS g, a{', ' + cs if cs else ''} FROM work "
                             f"WHERE r IN ({', '.join(map(str, roles))})", n_cohorts)  # fmt: skip

    def partition_moments(self, partition: Partition) -> CellMoments:
        """`estimates.cell_moments` per (cohort of `partition`, arm) over every row of the readout,
        routed as `Partition.route` routes them; needs no working table (no `load`)."""
        cs = "".join(f", CAST({self.col(c)} AS DOUBLE) AS c{i}"
                     for i, c in enumerate(self.components))  # fmt: skip
        return self._moments(f"SELECT {self.partition_expr(partition)} AS g, {self.arm_case()} AS a"
                             f"{cs} FROM src", partition.n_cohorts)  # fmt: skip

    def partition_expr(self, partition: Partition) -> str:
        """SQL for the cohort `Partition.route` gives a row of `src`: a numeric split sends
        x < threshold left, a categorical split sends its listed levels each way, and missing or
        unlisted values go the node's default way."""
        p = partition

        def walk(node: int) -> str:
            if p.feature[node] < 0:
                return str(int(p.cohort[node]))
            f = p.features[int(p.feature[node])]
            col = self.col(f.key)
            left, right = walk(int(p.left[node])), walk(int(p.right[node]))
            if left == right:
                return left
            if f.kind == "numeric":
                x = f"CAST({col} AS DOUBLE)"
                go_left = f"{x} < {num(p.threshold[node])}"
                known = f"NOT ({x} IS NULL OR isnan({x}))"
            else:
                x = f"CAST({col} AS STRING)"
                ll, rl = p.left_levels[node], p.right_levels[node]
                go_left = f"{x} IN ({', '.join(self.text(v) for v in ll)})" if ll else "FALSE"
                go_right = f"{x} IN ({', '.join(self.text(v) for v in rl)})" if rl else "FALSE"
                known = f"(({go_left}) OR ({go_right}))"
                go_left = f"({go_left})"
            default = "TRUE" if bool(p.default_left[node]) else "FALSE"
            cond = f"(CASE WHEN {known} THEN {go_left} ELSE {default} END)"
            return f"(CASE WHEN COALESCE({cond}, {default}) THEN {left} ELSE {right} END)"

        return walk(0)

    def _moments(self, inner: str, n_cohorts: int) -> CellMoments:
        """`estimates.cell_moments` over the rows of `inner` (a SELECT giving the cohort `g`, the
        arm code `a` and the components `c0..`), in two passes as there: the means per cell, then
        the cross-products of the values centred on their cell's mean."""
        C, J, Q = n_cohorts, len(self.arm_keys), len(self.components)
        sums = ", ".join(f"SUM(c{i}) AS s{i}" for i in range(Q))
        t = self.query(f"SELECT g, a, COUNT(*) AS n{', ' + sums if Q else ''} "
                       f"FROM ({inner}) AS rows_in GROUP BY 1, 2")  # fmt: skip
        n = np.zeros((C, J), dtype=np.int64)
        total = np.zeros((C, J, Q))
        g, a = _ints(t, "g"), _ints(t, "a")
        n[g, a] = _ints(t, "n")
        for i in range(Q):
            total[g, a, i] = _floats(t, f"s{i}")
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = total / n[..., None]
        cross = np.zeros((C, J, Q, Q))
        if Q and n.any():
            cells = sorted({int(c) * J + int(j) for c, j in zip(g, a, strict=True)})
            rows = ", ".join(
                "(" + ", ".join([str(x)] + [num(mean[x // J, x % J, i]) for i in range(Q)]) + ")"
                for x in cells
            )
            m_cols = ", ".join(f"m{i}" for i in range(Q))
            dev = {i: f"(t.c{i} - m.m{i})" for i in range(Q)}
            prods = ", ".join(f"SUM({dev[i]} * {dev[k]}) AS x{i}_{k}"
                              for i in range(Q) for k in range(i, Q))  # fmt: skip
            c_cols = ", ".join(f"c{i}" for i in range(Q))
            t2 = self.query(
                f"SELECT t.cell AS cell, {prods} FROM (SELECT g * {J} + a AS cell, {c_cols} "
                f"FROM ({inner}) AS rows_in) AS t JOIN (VALUES {rows}) AS m(cell, {m_cols}) "
                "ON t.cell = m.cell GROUP BY t.cell"
            )
            idx = _ints(t2, "cell")
            for i in range(Q):
                for k in range(i, Q):
                    v = _floats(t2, f"x{i}_{k}")
                    cross[idx // J, idx % J, i, k] = v
                    cross[idx // J, idx % J, k, i] = v
        with np.errstate(invalid="ignore", divide="ignore"):
            cov = np.where((n > 1)[..., None, None], cross / (n - 1)[..., None, None], np.nan)
        return CellMoments(components=tuple(self.components), n=n, mean=mean, cov=cov)


class _SqlLevels:
    """`tree.LevelHistograms` as one GROUPING SETS query per level: for every feature, counts and
    sums per (frontier slot, bin, arm, half); rows off the frontier are filtered out first."""

    def __init__(self, engine: SqlEngine, s_roles: tuple[int, ...], n_arms: int) -> None:
        self.e, self.s_roles, self.J = engine, s_roles, n_arms

    def level(self, tree: Tree, frontier: list[int]) -> Iterator[LevelHistogram]:
        e, J = self.e, self.J
        bins = e._bins
        assert bins is not None
        K = len(e._y)
        feats = [f for f in range(len(bins.features)) if int(bins.n_bins[f]) >= 3]
        if not feats:
            return
        S = len(frontier)
        slot_of = {node: s for s, node in enumerate(frontier)}
        slot = e.route_expr(tree, lambda leaf: slot_of.get(leaf, -1))
        roles = ", ".join(map(str, (0, *self.s_roles)))
        ys = ", ".join(f"{y} AS y{k}" for k, y in enumerate(e._y))
        bcols = ", ".join(f"b{f}" for f in feats)
        sums = ", ".join(f"SUM(y{k}) AS s{k}, SUM(y{k} * y{k}) AS q{k}" for k in range(K))
        sets = ", ".join(f"(sl, a, h, b{f})" for f in feats)
        sql = (
            f"SELECT sl, a, h, {bcols}, COUNT(*) AS n, {sums} FROM ("
            f"SELECT {slot} AS sl, a, CASE WHEN r = 0 THEN 1 ELSE 0 END AS h, {bcols}, {ys} "
            f"FROM work WHERE r IN ({roles})) AS t WHERE sl >= 0 "
            f"GROUP BY GROUPING SETS ({sets})"
        )
        t = e.query(sql)
        sl, a, h, cnt_all = _ints(t, "sl"), _ints(t, "a"), _ints(t, "h"), _ints(t, "n")
        s_all = [_floats(t, f"s{k}") for k in range(K)]
        q_all = [_floats(t, f"q{k}") for k in range(K)]
        for f in feats:
            col = t.column(f"b{f}")
            rows = np.flatnonzero(col.is_valid().to_numpy(zero_copy_only=False))
            b = np.asarray(col.take(pa.array(rows)).to_numpy(zero_copy_only=False), dtype=np.int64)
            nb = int(bins.n_bins[f])
            cnt = np.zeros((S, nb, J), dtype=np.int64)
            cnt_e = np.zeros((S, nb, J), dtype=np.int64)
            sums_f, sqs_f = np.zeros((S, nb, J, K)), np.zeros((S, nb, J, K))
            est = h[rows] == 1
            r_s, r_e = rows[~est], rows[est]
            cnt[sl[r_s], b[~est], a[r_s]] = cnt_all[r_s]
            cnt_e[sl[r_e], b[est], a[r_e]] = cnt_all[r_e]
            for k in range(K):
                sums_f[sl[r_s], b[~est], a[r_s], k] = s_all[k][r_s]
                sqs_f[sl[r_s], b[~est], a[r_s], k] = q_all[k][r_s]
            yield f, cnt, sums_f, sqs_f, cnt_e


def _code_set(col: str, codes: np.ndarray) -> str:
    """`col` in `codes`, as ranges (a numeric split is one range plus perhaps the missing code)."""
    if codes.size == 0:
        return "FALSE"
    breaks = np.flatnonzero(np.diff(codes) != 1) + 1
    parts = []
    for run in np.split(codes, breaks):
        lo, hi = int(run[0]), int(run[-1])
        parts.append(f"{col} = {lo}" if lo == hi else
                     f"{col} <= {hi}" if lo == 0 else f"{col} BETWEEN {lo} AND {hi}")  # fmt: skip
    return "(" + " OR ".join(parts) + ")"


def _ints(t: pa.Table, name: str) -> np.ndarray:
    return np.asarray(t.column(name).to_numpy(zero_copy_only=False), dtype=np.int64)


def _floats(t: pa.Table, name: str) -> np.ndarray:
    col = t.column(name).to_numpy(zero_copy_only=False)
    return np.asarray(np.where(col == None, 0.0, col) if col.dtype == object else col,  # noqa: E711
                      dtype=np.float64)  # fmt: skip
