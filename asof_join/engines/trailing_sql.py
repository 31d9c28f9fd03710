"""SQL for trailing-window aggregates: a RANGE frame for fixed delays, a sweep for known times."""

from __future__ import annotations

from collections.abc import Callable, Hashable
from typing import TYPE_CHECKING, cast

from ..plan import Route, TrailingLookup, TrailingValue

if TYPE_CHECKING:
    from .render import SqlRenderer

Columns = dict[tuple[str, int], str]


def render_trailing(r: SqlRenderer, lookup: TrailingLookup, label: str) -> tuple[str, Columns]:
    """Render one trailing lookup; returns the join clause and each value's expression.

    For the renderer's driving lookup (``r.driving_step``, a frame lookup) the result carries
    the label relation's columns, one row per label, and is returned in place of a join clause:
    it becomes the relation the other lookups join to, which saves a join on position.
    """
    n = r.n
    cols = _value_columns(lookup)
    rows = r.rows_cte(lookup, cols)
    drive = lookup.step == r.driving_step
    if lookup.route == Route.FRAME:
        result, exprs = _frame(r, lookup, rows, cols, carry=r.label_columns() if drive else [])
    else:
        result, exprs = _sweep(r, lookup, rows, cols)
    alias = label if drive else f"f{lookup.step}"
    join = (
        result if drive else f"LEFT JOIN {result} AS {alias} ON {alias}.{n.row} = {label}.{n.row}"
    )
    columns: Columns = {}
    for i, expr in enumerate(exprs):
        value = f"{alias}.{expr}"
        if r.plan.keep_null_label_times:
            value = f"CASE WHEN {label}.{n.t} IS NOT NULL THEN {value} END"
        columns[("value", i)] = value
    return join, columns


def _value_columns(lookup: TrailingLookup) -> list[str | None]:
    cols: list[str | None] = []
    for v in lookup.values:
        if v.column is not None and v.column not in cols:
            cols.append(v.column)
    return cols


def _keys(r: SqlRenderer, lookup: TrailingLookup) -> list[str]:
    return [r.n("k", i) for i in range(len(lookup.table_keys))]


def _label_keys(r: SqlRenderer, lookup: TrailingLookup) -> list[str]:
    return [
        f"{r.key_column(lookup, i, c, label=True)} AS {r.n('k', i)}"
        for i, c in enumerate(lookup.label_keys)
    ]


def _v(r: SqlRenderer, cols: list[str | None], v: TrailingValue) -> str:
    return r.n("v", cols.index(v.column))


# -- fixed delay: one RANGE frame per window over labels and rows sorted together ---------------


def _frame(
    r: SqlRenderer,
    lookup: TrailingLookup,
    rows: str,
    cols: list[str | None],
    carry: list[str],
) -> tuple[str, list[str]]:
    """Visible rows in the window have valid time in [t - w + 1us, t - d - 1us] (strict).

    `carry` names label-relation columns to pass through to the result (see render_trailing).
    """
    n = r.n
    keys = _keys(r, lookup)
    # label position p = t - d - 1us (strict) or t - d (inclusive); frame [p - offset, p]
    shift = lookup.delay_us + (0 if lookup.inclusive else 1)
    vals = [n("v", i) for i in range(len(cols))]
    null_vals = [f"NULL AS {n('v', i)}" for i in range(len(cols))]
    # the table's rows have a null row number, label rows a position: that tells them apart
    union = r.cte(
        f"__aj_tu{lookup.step}",
        f"SELECT {', '.join(keys)}, {r.epoch_us(n.s)} AS {n.p}, "
        f"CAST(NULL AS {r.row_type()}) AS {n.row}"
        + "".join(", " + v for v in vals)
        + "".join(f", NULL AS {c}" for c in carry)
        + f"\n    FROM {rows}\n    UNION ALL\n    SELECT {', '.join(_label_keys(r, lookup))}, "
        f"{r.epoch_us(n.t)} - {int(shift)} AS {n.p}, {n.row}"
        + "".join(", " + v for v in null_vals)
        + "".join(f", {c}" for c in carry)
        + f"\n    FROM {n.labels}",
    )
    passed = "".join(f", {c}" for c in carry)
    windows: dict[int, str] = {}
    is_row = f"{n.row} IS NULL"  # a row of the table, not a label
    aggregates = _Aggregates(r, r.lane_bits(lookup.table), is_row)
    exprs: list[str] = []
    outputs: list[str] = []
    plans: list[tuple[TrailingValue, str | None, str, bool]] = []  # (value, x/alias, window, fused)
    for v in lookup.values:
        offset = v.over_us - shift - 1
        never = offset < 0  # the window closes before anything is visible
        offset = max(offset, 0)
        if offset not in windows:
            windows[offset] = f"w{len(windows)}"
        w = windows[offset]
        x = None if v.column is None else _v(r, cols, v)  # None: the table's rows themselves
        fused = r.PACKS_COUNTS and not never and v.agg in ("count", "sum", "mean")
        if fused:
            aggregates.need(v, x, w)  # every count first, so they pair up in lanes
        else:
            arg = f"CASE WHEN {is_row} THEN 1 END" if x is None else x
            arg, flt = r.never(arg) if never else (arg, "")
            x = aggregates.add(_frame_agg(r, v, arg, flt, w))
        plans.append((v, x, w, fused))
    for i, (v, x, w, fused) in enumerate(plans):
        out = aggregates.fused(v, x, w) if fused else x
        outputs.append(f"{out} AS {n('a', i)}")
        exprs.append(n("a", i))
    part = ", ".join(keys)
    window_sql = ", ".join(
        f"{name} AS (PARTITION BY {part} ORDER BY {n.p} "
        f"RANGE BETWEEN {int(off)} PRECEDING AND CURRENT ROW)"
        for off, name in windows.items()
    )
    body = (
        f"SELECT {n.row}{passed}, {', '.join(outputs)} FROM (\n    SELECT {n.row}{passed}, "
        f"{', '.join(aggregates.selects())}\n    FROM {union}\n"
        f"    WINDOW {window_sql})\n    WHERE {n.row} IS NOT NULL"
    )
    return r.cte(f"__aj_trail{lookup.step}", body), exprs


def _ones(x: str) -> str:
    """1 on rows where x is not null, else 0: summed over a window, a count."""
    return f"CASE WHEN {x} IS NULL THEN 0 ELSE 1 END"


class _Lanes:
    """The counts of one lookup, sharing each window's sum two at a time.

    A count is a sum of 0/1 over a window. The window sums are the costly part (a segment
    tree per frame aggregate, a running sum per sweep column), so two counts of one window are
    the two lanes of one packed sum, ``first * 2^bits + second``. With ``bits=32`` (a table of
    fewer than 2^31 rows, ``SqlRenderer.lane_bits``) the pack is a BIGINT; otherwise a HUGEINT
    of two 64-bit lanes. Exact either way: a count never exceeds the table's rows, and in the
    sweep a lane can dip below zero between rows but is a count again at every label row. A
    count left alone is a plain sum. Dialects without packing (``PACKS_COUNTS = False``) get
    one sum per count. Register every count with ``need`` before reading any with ``read``.
    """

    def __init__(
        self, r: SqlRenderer, aggregate: Callable[[Hashable, str], str], bits: int = 64
    ) -> None:
        self.r = r
        self.aggregate = aggregate  # (window, summed expression) -> column alias
        self.bits = bits
        self._packs: list[tuple[Hashable, list[str]]] = []  # (window, 0/1 expressions)
        self._where: dict[tuple[Hashable, str], tuple[int, int]] = {}  # -> (pack, lane)

    def need(self, window: Hashable, ones: str) -> None:
        """Register the count of `ones` over `window`."""
        if (window, ones) in self._where:
            return
        pack = None
        if self.r.PACKS_COUNTS:
            pack = next(
                (i for i, (w, xs) in enumerate(self._packs) if w == window and len(xs) < 2),
                None,
            )
        if pack is None:
            pack = len(self._packs)
            self._packs.append((window, []))
        self._packs[pack][1].append(ones)
        self._where[(window, ones)] = (pack, len(self._packs[pack][1]) - 1)

    def read(self, window: Hashable, ones: str) -> str:
        """The count as a BIGINT expression over the aggregate's column."""
        pack, lane = self._where[(window, ones)]
        w, members = self._packs[pack]
        if len(members) == 1:
            return f"CAST(coalesce({self.aggregate(w, members[0])}, 0) AS BIGINT)"
        bits = self.bits
        if bits == 32:
            a, b = members
        else:
            a, b = (f"CAST({m} AS HUGEINT)" for m in members)
        packed = self.aggregate(w, f"{a} * {1 << bits} + {b}")
        value = f"({packed} >> {bits})" if lane == 0 else f"({packed} & {(1 << bits) - 1})"
        return f"CAST(coalesce({value}, 0) AS BIGINT)"


class _Aggregates:
    """The window aggregates of one frame lookup, each computed once however many outputs use it.

    Every window aggregate is a pass of DuckDB's segment tree (about a third of a 5M x 10M
    30-day build each), so outputs share them: counts, and the denominator of `mean`, are
    lanes of packed sums (`_Lanes`), and `mean` divides the same sum that `sum` returns.
    """

    def __init__(self, r: SqlRenderer, bits: int, is_row: str) -> None:
        self.r = r
        self.is_row = is_row  # true on the table's rows, false on label rows
        self._aliases: dict[str, str] = {}  # aggregate SQL -> alias in the inner select
        self.lanes = _Lanes(r, lambda w, summed: self.add(f"sum({summed}) OVER {w}"), bits)

    def _ones(self, x: str | None) -> str:
        """1 where the table's row counts (x not null; any row when x is None), else 0."""
        return f"CASE WHEN {self.is_row} THEN 1 ELSE 0 END" if x is None else _ones(x)

    def add(self, aggregate: str) -> str:
        """The alias of a window aggregate, added on first use."""
        if aggregate not in self._aliases:
            self._aliases[aggregate] = self.r.n("g", len(self._aliases))
        return self._aliases[aggregate]

    def need(self, v: TrailingValue, x: str | None, w: str) -> None:
        """Register the counts a count or mean output reads (call for every output first)."""
        if v.agg in ("count", "mean"):
            self.lanes.need(w, self._ones(x))

    def fused(self, v: TrailingValue, x: str | None, w: str) -> str:
        """The output expression of a count, sum or mean over window `w`."""
        if v.agg == "count":
            return self.lanes.read(w, self._ones(x))
        assert x is not None  # sum and mean read a column
        total = self.add(
            f"sum(CAST({x} AS BIGINT)) OVER {w}" if v.integer else f"sum({x}) OVER {w}"
        )
        if v.agg == "sum":
            if v.integer:
                return f"CAST(coalesce({total}, 0) AS BIGINT)"
            return f"coalesce({total}, 0)"
        return f"CAST({total} AS DOUBLE) / nullif({self.lanes.read(w, self._ones(x))}, 0)"

    def selects(self) -> list[str]:
        """The inner select's aggregates."""
        return [f"{sql} AS {alias}" for sql, alias in self._aliases.items()]


def _frame_agg(r: SqlRenderer, v: TrailingValue, x: str, flt: str, w: str) -> str:
    if v.agg == "count":
        return f"count({x}){flt} OVER {w}"
    if v.agg == "count_distinct":
        return r.count_distinct_over(x, flt, w)
    if v.agg == "sum":
        if v.integer:
            return f"CAST(coalesce(sum(CAST({x} AS BIGINT)){flt} OVER {w}, 0) AS BIGINT)"
        return f"coalesce(sum({x}){flt} OVER {w}, 0)"
    if v.agg == "mean":
        return f"avg(CAST({x} AS DOUBLE)){flt} OVER {w}"
    if v.agg == "std":
        return f"stddev_samp(CAST({x} AS DOUBLE)){flt} OVER {w}"
    if v.agg in ("min", "max"):
        return f"{v.agg}({x}){flt} OVER {w}"
    msg = f"aggregate {v.agg!r} has no frame rendering"  # `last` is planned as a latest lookup
    raise ValueError(msg)


# -- known-time column: rows live on intervals (known, valid + w) of label time ---------------
#
# Sorted together by position and kind (exit, label, enter when strict; exit, enter, label when
# inclusive), a running sum at a label row counts exactly the rows with known < t and
# valid + w > t. Exits of intervals that are empty are moved onto their entry so they cancel.


def _sweep(
    r: SqlRenderer, lookup: TrailingLookup, rows: str, cols: list[str | None]
) -> tuple[str, list[str]]:
    n = r.n
    keys = _keys(r, lookup)
    part = ", ".join(keys)
    strict = not lookup.inclusive
    enter_kind, label_kind = (2, 1) if strict else (1, 2)
    windows = sorted({v.over_us for v in lookup.values})
    vals = [n("v", i) for i in range(len(cols))]
    null_vals = [f"NULL AS {n('v', i)}" for i in range(len(cols))]
    # per-key centre of each column, so sums of squares do not cancel catastrophically
    centre_cols = [
        n("c", i)
        for i, v in enumerate(cols)
        if any(x.agg == "std" and x.column == v for x in lookup.values)
    ]
    centred = [
        f"avg(CAST({n('v', i)} AS DOUBLE)) OVER (PARTITION BY {part}) AS {n('c', i)}"
        for i, v in enumerate(cols)
        if any(x.agg == "std" and x.column == v for x in lookup.values)
    ]
    base = r.cte(
        f"__aj_ev{lookup.step}",
        f"SELECT {part}, {n.ord}, {r.epoch_us(n.kt)} AS {n.a}, "
        f"{r.epoch_us(n.s)} AS {n.sv}"
        + "".join(", " + v for v in vals)
        + "".join(", " + c for c in centred)
        + f"\n    FROM {rows}",
    )
    carry = vals + centre_cols
    null_carry = null_vals + [f"NULL AS {c}" for c in centre_cols]
    pad = 1 if strict else 0
    parts = [
        f"SELECT {part}, {n.ord}, {n.a} AS {n.p}, {enter_kind} AS {n.kind}, "
        f"-1 AS {n.tag}, CAST(NULL AS {r.row_type()}) AS {n.row}"
        + "".join(", " + c for c in carry)
        + f" FROM {base}"
    ]
    for j, w in enumerate(windows):
        parts.append(
            f"SELECT {part}, {n.ord}, greatest({n.sv} + {int(w)}, {n.a} + {pad}), "
            f"0, {j}, NULL" + "".join(", " + c for c in carry) + f" FROM {base}"
        )
    # count_distinct: merge each (key, value)'s intervals into disjoint islands first
    distinct = [(i, v) for i, v in enumerate(lookup.values) if v.agg == "count_distinct"]
    for i, v in distinct:
        isl = _islands(r, lookup, base, cols, v, i, strict)
        parts.append(
            f"SELECT {part}, NULL, {n.lo}, {enter_kind}, {1000 + i}, NULL"
            + "".join(", " + c for c in null_carry)
            + f" FROM {isl}"
        )
        parts.append(
            f"SELECT {part}, NULL, {n.hi}, 0, {2000 + i}, NULL"
            + "".join(", " + c for c in null_carry)
            + f" FROM {isl}"
        )
    parts.append(
        f"SELECT {', '.join(_label_keys(r, lookup))}, NULL, {r.epoch_us(n.t)}, {label_kind}, "
        f"-2, {n.row}" + "".join(", " + c for c in null_carry) + f" FROM {n.labels}"
    )
    union = r.cte(f"__aj_su{lookup.step}", "\n    UNION ALL ".join(parts))

    win = (
        f"(PARTITION BY {part} ORDER BY {n.p}, {n.kind} "
        "ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW)"
    )
    sums: dict[str, str] = {}  # alias -> running sum, each computed once
    aliases: dict[str, str] = {}  # running sum -> alias

    def running(x: str, window_index: int) -> str:
        """Enter rows add x, exit rows of window `window_index` subtract it: the running sum
        at a label row is the sum over the rows whose interval holds the label."""
        expr = (
            f"sum(CASE WHEN {n.tag} = -1 THEN {x} "
            f"WHEN {n.tag} = {window_index} THEN -({x}) END) OVER {win}"
        )
        if expr not in aliases:
            aliases[expr] = f"r{len(aliases)}"
            sums[aliases[expr]] = expr
        return r.q(aliases[expr])

    lanes = _Lanes(r, lambda j, summed: running(summed, cast(int, j)), r.lane_bits(lookup.table))

    def ones(x: str | None) -> str:
        return "1" if x is None else _ones(x)

    for v in lookup.values:  # every count first, so they pair up in lanes
        if v.agg in ("count", "mean", "std") or (v.agg == "sum" and not v.integer):
            x = None if v.column is None else _v(r, cols, v)
            lanes.need(windows.index(v.over_us), ones(x))

    def count(x: str | None, window_index: int) -> str:
        """Rows of window `window_index` holding the label where x is not null (BIGINT)."""
        return lanes.read(window_index, ones(x))

    outs: list[str | None] = []
    need_ranks = any(v.agg in ("min", "max") for v in lookup.values)
    for i, v in enumerate(lookup.values):
        j = windows.index(v.over_us)
        x = None if v.column is None else _v(r, cols, v)
        if v.agg == "count":
            outs.append(count(x, j))
        elif v.agg in ("sum", "mean"):
            assert x is not None
            xv = f"CAST({x} AS BIGINT)" if v.integer else x
            total = running(f"coalesce({xv}, 0)", j)  # shared by sum and mean
            if v.agg == "mean":
                nonnull = count(x, j)
                outs.append(f"CASE WHEN {nonnull} > 0 THEN CAST({total} AS DOUBLE) / {nonnull} END")
            elif v.integer:
                outs.append(f"CAST(coalesce({total}, 0) AS BIGINT)")
            else:
                # a float running sum can leave 1e-13 behind when every value has left the
                # window: an empty window is exactly 0, decided by the exact running count
                outs.append(f"CASE WHEN {count(x, j)} = 0 THEN 0.0 ELSE {total} END")
        elif v.agg == "std":
            assert x is not None
            cnt_sum = count(x, j)
            c = n("c", cols.index(v.column))
            d = f"coalesce(CAST({x} AS DOUBLE) - {c}, 0)"
            s1 = running(d, j)
            s2 = running(f"{d} * {d}", j)
            var = f"greatest(({s2} - {s1} * {s1} / {cnt_sum}) / ({cnt_sum} - 1), 0)"
            outs.append(f"CASE WHEN {cnt_sum} > 1 THEN sqrt({var}) END")
        elif v.agg == "count_distinct":
            sums[f"u{i}"] = (
                f"sum(CASE WHEN {n.tag} = {1000 + i} THEN 1 "
                f"WHEN {n.tag} = {2000 + i} THEN -1 END) OVER {win}"
            )
            outs.append(f"CAST(coalesce({r.q(f'u{i}')}, 0) AS BIGINT)")
        elif v.agg in ("min", "max"):
            outs.append(None)  # read from the dyadic blocks below
        else:  # pragma: no cover - `last` is planned as a latest lookup
            msg = f"aggregate {v.agg!r} has no sweep rendering"
            raise ValueError(msg)
    select = [f"{expr} AS {r.q(name)}" for name, expr in sums.items()]
    if need_ranks:
        select.append(f"count({n.row}) OVER {win} AS {n.rank}")
    swept = r.cte(
        f"__aj_sw{lookup.step}",
        f"SELECT {part}, {n.ord}, {n.tag}, {n.row}, {n.p}"
        + "".join(", " + c for c in carry)
        + (", " + ", ".join(select) if select else "")
        + f"\n    FROM {union}",
    )
    plain = [(i, o) for i, o in enumerate(outs) if o is not None]
    label_sel = "".join(f", {o} AS {n('a', i)}" for i, o in plain)
    body = f"SELECT {n.row}{label_sel}\n    FROM {swept} WHERE {n.tag} = -2"
    if need_ranks:
        body = _with_extrema(r, lookup, swept, cols, windows, body)
    result = r.cte(f"__aj_trail{lookup.step}", body)
    return result, [n("a", i) for i in range(len(lookup.values))]


def _islands(
    r: SqlRenderer,
    lookup: TrailingLookup,
    base: str,
    cols: list[str | None],
    v: TrailingValue,
    i: int,
    strict: bool,
) -> str:
    """Per (key, value): the union of its rows' intervals as disjoint [lo, hi) islands."""
    n = r.n
    keys = _keys(r, lookup)
    part = ", ".join(keys)
    x = _v(r, cols, v)
    w = int(v.over_us)
    # strict intervals (a, b) hold an integer only when b - a >= 2; inclusive [a, b) when b > a
    min_len = 2 if strict else 1
    iv = r.cte(
        f"__aj_iv{lookup.step}_{i}",
        f"SELECT {part}, {x} AS {n.x}, {n.a}, {n.sv} + {w} AS {n.b}\n"
        f"    FROM {base} WHERE {x} IS NOT NULL AND {n.sv} + {w} - {n.a} >= {min_len}",
    )
    touch = ">=" if strict else ">"  # open intervals meeting at a point leave that point out
    prev = (
        f"max({n.b}) OVER (PARTITION BY {part}, {n.x} ORDER BY {n.a}, {n.b} "
        "ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING)"
    )
    flagged = r.cte(
        f"__aj_if{lookup.step}_{i}",
        f"SELECT *, CASE WHEN {prev} IS NULL OR {n.a} {touch} {prev} THEN 1 ELSE 0 END "
        f"AS {n.new}\n    FROM {iv}",
    )
    numbered = r.cte(
        f"__aj_in{lookup.step}_{i}",
        f"SELECT *, sum({n.new}) OVER (PARTITION BY {part}, {n.x} ORDER BY "
        f"{n.a}, {n.b} ROWS UNBOUNDED PRECEDING) AS {n.isl}\n    FROM {flagged}",
    )
    return r.cte(
        f"__aj_is{lookup.step}_{i}",
        f"SELECT {part}, min({n.a}) AS {n.lo}, max({n.b}) AS {n.hi}\n"
        f"    FROM {numbered} GROUP BY {part}, {n.x}, {n.isl}",
    )


def _with_extrema(
    r: SqlRenderer,
    lookup: TrailingLookup,
    swept: str,
    cols: list[str | None],
    windows: list[int],
    body: str,
) -> str:
    """min/max over intervals: each row's label-rank range [lo, hi) split into dyadic blocks."""
    n = r.n
    keys = _keys(r, lookup)
    part = ", ".join(keys)
    ext = [(i, v) for i, v in enumerate(lookup.values) if v.agg in ("min", "max")]
    ext_cols = sorted({cols.index(v.column) for _, v in ext})
    carry = "".join(f", e.{n('v', c)}" for c in ext_cols)
    ekeys = ", ".join(f"e.{k}" for k in keys)
    # lo = labels before a row's entry, hi = labels before its exit (ranks are 0-based)
    spans = r.cte(
        f"__aj_sp{lookup.step}",
        f"SELECT {ekeys}, x.{n.tag} AS {n.j}, e.{n.rank} AS {n.lo}, "
        f"x.{n.rank} AS {n.hi}{carry}\n"
        f"    FROM {swept} AS e JOIN {swept} AS x ON x.{n.ord} = e.{n.ord} "
        f"AND x.{n.tag} >= 0 AND x.{n.tag} < 1000\n"
        f"    WHERE e.{n.tag} = -1 AND x.{n.rank} > e.{n.rank}",
    )
    level = n.l
    one = r.shift_left("1", level)
    lv = r.cte(
        f"__aj_lv{lookup.step}",
        f"SELECT *, {r.shift_right(f'({n.lo} + {one} - 1)', level)} "
        f"AS {n.la}, "
        f"{r.shift_right(n.hi, level)} AS {n.ra}\n    FROM (SELECT *, "
        + r.unnest_range("0", f"CAST(floor(log2({n.hi} - {n.lo})) AS BIGINT) + 2")
        + f" AS {level} FROM {spans})",
    )
    aggs = []
    for i, v in ext:
        aggs.append(f"{v.agg}({n('v', cols.index(v.column))}) AS {n('b', i)}")
    blocks = r.cte(
        f"__aj_bk{lookup.step}",
        f"SELECT {part}, {n.j}, {level}, {n.idx}, {', '.join(aggs)}\n    FROM ("
        f"SELECT *, {n.la} AS {n.idx} FROM {lv} WHERE {n.la} < {n.ra} "
        f"AND {n.la} % 2 = 1\n    UNION ALL SELECT *, {n.ra} - 1 FROM {lv} "
        f"WHERE {n.la} < {n.ra} AND {n.ra} % 2 = 1)\n"
        f"    GROUP BY {part}, {n.j}, {level}, {n.idx}",
    )
    # a label of rank r sits in block (level, r >> level) on every level up to log2(labels)
    labels = r.cte(
        f"__aj_lr{lookup.step}",
        "SELECT *, "
        + r.unnest_range("0", f"CAST(floor(log2(greatest({n.n}, 1))) AS BIGINT) + 2")
        + f" AS {level}\n    FROM (SELECT {part}, {n.row}, {n.rank} - 1 AS {n.r}, "
        f"max({n.rank}) OVER (PARTITION BY {part}) AS {n.n}\n"
        f"    FROM {swept} WHERE {n.tag} = -2)",
    )
    picks = []
    for i, v in ext:
        j = windows.index(v.over_us)
        picks.append(f"{v.agg}(CASE WHEN b.{n.j} = {j} THEN b.{n('b', i)} END) AS {n('a', i)}")
    on = " AND ".join(f"b.{k} = l.{k}" for k in keys)
    found = r.cte(
        f"__aj_ex{lookup.step}",
        f"SELECT l.{n.row}, {', '.join(picks)}\n    FROM {labels} AS l JOIN {blocks} AS b "
        f"ON {on} AND b.{level} = l.{level} "
        f"AND b.{n.idx} = {r.shift_right(f'l.{n.r}', f'l.{level}')}\n    GROUP BY l.{n.row}",
    )
    picked = "".join(f", x.{n('a', i)}" for i, _ in ext)
    return (
        f"SELECT t.*{picked}\n    FROM ({body}) AS t "
        f"LEFT JOIN {found} AS x ON x.{n.row} = t.{n.row}"
    )
