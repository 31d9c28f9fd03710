"""SQL for trailing-window aggregates: a RANGE frame for fixed delays, a sweep for known times."""

from __future__ import annotations

from typing import TYPE_CHECKING

from ..plan import Route, TrailingLookup, TrailingValue
from .sql import quote_ident as q

if TYPE_CHECKING:
    from .render import SqlRenderer

Columns = dict[tuple[str, int], str]


def render_trailing(r: SqlRenderer, lookup: TrailingLookup, label: str) -> tuple[str, Columns]:
    """Render one trailing lookup; returns the join clause and each value's expression."""
    cols = _value_columns(lookup)
    rows = r.rows_cte(lookup, cols)
    if lookup.route == Route.FRAME:
        result, exprs = _frame(r, lookup, rows, cols)
    else:
        result, exprs = _sweep(r, lookup, rows, cols)
    alias = f"f{lookup.step}"
    join = f'LEFT JOIN {result} AS {alias} ON {alias}."__aj_row" = {label}."__aj_row"'
    columns: Columns = {}
    for i, expr in enumerate(exprs):
        value = f"{alias}.{expr}"
        if r.plan.keep_null_label_times:
            value = f'CASE WHEN {label}."__aj_t" IS NOT NULL THEN {value} END'
        columns[("value", i)] = value
    return join, columns


def _value_columns(lookup: TrailingLookup) -> list[str | None]:
    cols: list[str | None] = []
    for v in lookup.values:
        if v.column is not None and v.column not in cols:
            cols.append(v.column)
    return cols


def _keys(lookup: TrailingLookup) -> list[str]:
    return [f'"__aj_k{i}"' for i in range(len(lookup.table_keys))]


def _label_keys(lookup: TrailingLookup) -> list[str]:
    return [f'{q(c)} AS "__aj_k{i}"' for i, c in enumerate(lookup.label_keys)]


def _v(cols: list[str | None], v: TrailingValue) -> str:
    return f'"__aj_v{cols.index(v.column)}"'


# -- fixed delay: one RANGE frame per window over labels and rows sorted together ---------------


def _frame(
    r: SqlRenderer, lookup: TrailingLookup, rows: str, cols: list[str | None]
) -> tuple[str, list[str]]:
    """Visible rows in the window have valid time in [t - w + 1us, t - d - 1us] (strict)."""
    keys = _keys(lookup)
    # label position p = t - d - 1us (strict) or t - d (inclusive); frame [p - offset, p]
    shift = lookup.delay_us + (0 if lookup.inclusive else 1)
    vals = [f'"__aj_v{i}"' for i in range(len(cols))]
    null_vals = [f'NULL AS "__aj_v{i}"' for i in range(len(cols))]
    union = r.cte(
        f"__aj_tu{lookup.step}",
        f'SELECT {", ".join(keys)}, epoch_us("__aj_s") AS "__aj_p", '
        f'CAST(NULL AS BIGINT) AS "__aj_row", 1 AS "__aj_one"'
        + "".join(", " + v for v in vals)
        + f"\n    FROM {rows}\n    UNION ALL\n    SELECT {', '.join(_label_keys(lookup))}, "
        f'epoch_us("__aj_t") - {int(shift)} AS "__aj_p", "__aj_row", NULL AS "__aj_one"'
        + "".join(", " + v for v in null_vals)
        + '\n    FROM "__aj_labels"',
    )
    windows: dict[int, str] = {}
    exprs: list[str] = []
    selects: list[str] = []
    for i, v in enumerate(lookup.values):
        offset = v.over_us - shift - 1
        never = offset < 0  # the window closes before anything is visible
        offset = max(offset, 0)
        if offset not in windows:
            windows[offset] = f"w{len(windows)}"
        w = windows[offset]
        x = '"__aj_one"' if v.column is None else _v(cols, v)
        flt = " FILTER (WHERE false)" if never else ""
        agg = _frame_agg(v, x, flt, w)
        selects.append(f'{agg} AS "__aj_a{i}"')
        exprs.append(f'"__aj_a{i}"')
    part = ", ".join(keys)
    window_sql = ", ".join(
        f'{name} AS (PARTITION BY {part} ORDER BY "__aj_p" '
        f"RANGE BETWEEN {int(off)} PRECEDING AND CURRENT ROW)"
        for off, name in windows.items()
    )
    body = (
        f'SELECT * FROM (SELECT "__aj_row", {", ".join(selects)}\n    FROM {union}\n'
        f'    WINDOW {window_sql})\n    WHERE "__aj_row" IS NOT NULL'
    )
    return r.cte(f"__aj_trail{lookup.step}", body), exprs


def _frame_agg(v: TrailingValue, x: str, flt: str, w: str) -> str:
    if v.agg == "count":
        return f"count({x}){flt} OVER {w}"
    if v.agg == "count_distinct":
        return f"count(DISTINCT {x}){flt} OVER {w}"
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
    keys = _keys(lookup)
    part = ", ".join(keys)
    strict = not lookup.inclusive
    enter_kind, label_kind = (2, 1) if strict else (1, 2)
    windows = sorted({v.over_us for v in lookup.values})
    vals = [f'"__aj_v{i}"' for i in range(len(cols))]
    null_vals = [f'NULL AS "__aj_v{i}"' for i in range(len(cols))]
    # per-key centre of each column, so sums of squares do not cancel catastrophically
    centred = [
        f'avg(CAST("__aj_v{i}" AS DOUBLE)) OVER (PARTITION BY {part}) AS "__aj_c{i}"'
        for i, v in enumerate(cols)
        if any(x.agg == "std" and x.column == v for x in lookup.values)
    ]
    base = r.cte(
        f"__aj_ev{lookup.step}",
        f'SELECT {part}, "__aj_ord", epoch_us("__aj_kt") AS "__aj_a", '
        f'epoch_us("__aj_s") AS "__aj_sv"'
        + "".join(", " + v for v in vals)
        + "".join(", " + c for c in centred)
        + f"\n    FROM {rows}",
    )
    centre_cols = [c.rsplit(" AS ", 1)[1] for c in centred]
    carry = vals + centre_cols
    null_carry = null_vals + [f"NULL AS {c}" for c in centre_cols]
    pad = 1 if strict else 0
    parts = [
        f'SELECT {part}, "__aj_ord", "__aj_a" AS "__aj_p", {enter_kind} AS "__aj_kind", '
        f'-1 AS "__aj_tag", CAST(NULL AS BIGINT) AS "__aj_row"'
        + "".join(", " + c for c in carry)
        + f" FROM {base}"
    ]
    for j, w in enumerate(windows):
        parts.append(
            f'SELECT {part}, "__aj_ord", greatest("__aj_sv" + {int(w)}, "__aj_a" + {pad}), '
            f"0, {j}, NULL" + "".join(", " + c for c in carry) + f" FROM {base}"
        )
    # count_distinct: merge each (key, value)'s intervals into disjoint islands first
    distinct = [(i, v) for i, v in enumerate(lookup.values) if v.agg == "count_distinct"]
    for i, v in distinct:
        isl = _islands(r, lookup, base, cols, v, i, strict)
        parts.append(
            f'SELECT {part}, NULL, "__aj_lo", {enter_kind}, {1000 + i}, NULL'
            + "".join(", " + c for c in null_carry)
            + f" FROM {isl}"
        )
        parts.append(
            f'SELECT {part}, NULL, "__aj_hi", 0, {2000 + i}, NULL'
            + "".join(", " + c for c in null_carry)
            + f" FROM {isl}"
        )
    parts.append(
        f'SELECT {", ".join(_label_keys(lookup))}, NULL, epoch_us("__aj_t"), {label_kind}, '
        f'-2, "__aj_row"' + "".join(", " + c for c in null_carry) + ' FROM "__aj_labels"'
    )
    union = r.cte(f"__aj_su{lookup.step}", "\n    UNION ALL ".join(parts))

    win = (
        f'(PARTITION BY {part} ORDER BY "__aj_p", "__aj_kind" '
        "ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW)"
    )
    sums: dict[str, str] = {}

    def running(name: str, x: str, window_index: int) -> str:
        if name not in sums:
            sums[name] = (
                f'sum(CASE WHEN "__aj_tag" = -1 THEN {x} '
                f'WHEN "__aj_tag" = {window_index} THEN -({x}) END) OVER {win}'
            )
        return f'"{name}"'

    outs: list[str | None] = []
    need_ranks = any(v.agg in ("min", "max") for v in lookup.values)
    for i, v in enumerate(lookup.values):
        j = windows.index(v.over_us)
        x = None if v.column is None else _v(cols, v)
        if v.agg == "count":
            cnt = "1" if x is None else f"CASE WHEN {x} IS NULL THEN 0 ELSE 1 END"
            outs.append(f"CAST(coalesce({running(f'n{i}', cnt, j)}, 0) AS BIGINT)")
        elif v.agg == "sum":
            assert x is not None
            xv = f"CAST({x} AS BIGINT)" if v.integer else x
            total = running(f"s{i}", f"coalesce({xv}, 0)", j)
            expr = f"coalesce({total}, 0)"
            outs.append(f"CAST({expr} AS BIGINT)" if v.integer else expr)
        elif v.agg in ("mean", "std"):
            assert x is not None
            n = running(f"n{i}", f"CASE WHEN {x} IS NULL THEN 0 ELSE 1 END", j)
            if v.agg == "mean":
                s1 = running(f"s{i}", f"coalesce(CAST({x} AS DOUBLE), 0)", j)
                outs.append(f"CASE WHEN {n} > 0 THEN {s1} / {n} END")
            else:
                c = f'"__aj_c{cols.index(v.column)}"'
                d = f"coalesce(CAST({x} AS DOUBLE) - {c}, 0)"
                s1 = running(f"d{i}", d, j)
                s2 = running(f"q{i}", f"{d} * {d}", j)
                var = f"greatest(({s2} - {s1} * {s1} / {n}) / ({n} - 1), 0)"
                outs.append(f"CASE WHEN {n} > 1 THEN sqrt({var}) END")
        elif v.agg == "count_distinct":
            sums[f"u{i}"] = (
                f'sum(CASE WHEN "__aj_tag" = {1000 + i} THEN 1 '
                f'WHEN "__aj_tag" = {2000 + i} THEN -1 END) OVER {win}'
            )
            outs.append(f'CAST(coalesce("u{i}", 0) AS BIGINT)')
        elif v.agg in ("min", "max"):
            outs.append(None)  # read from the dyadic blocks below
        else:  # pragma: no cover - `last` is planned as a latest lookup
            msg = f"aggregate {v.agg!r} has no sweep rendering"
            raise ValueError(msg)
    select = [f'{expr} AS "{name}"' for name, expr in sums.items()]
    if need_ranks:
        select.append(f'count("__aj_row") OVER {win} AS "__aj_rank"')
    swept = r.cte(
        f"__aj_sw{lookup.step}",
        f'SELECT {part}, "__aj_ord", "__aj_tag", "__aj_row", "__aj_p"'
        + "".join(", " + c for c in carry)
        + (", " + ", ".join(select) if select else "")
        + f"\n    FROM {union}",
    )
    plain = [(i, o) for i, o in enumerate(outs) if o is not None]
    label_sel = "".join(f', {o} AS "__aj_a{i}"' for i, o in plain)
    body = f'SELECT "__aj_row"{label_sel}\n    FROM {swept} WHERE "__aj_tag" = -2'
    if need_ranks:
        body = _with_extrema(r, lookup, swept, cols, windows, body)
    result = r.cte(f"__aj_trail{lookup.step}", body)
    return result, [f'"__aj_a{i}"' for i in range(len(lookup.values))]


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
    keys = _keys(lookup)
    part = ", ".join(keys)
    x = _v(cols, v)
    w = int(v.over_us)
    # strict intervals (a, b) hold an integer only when b - a >= 2; inclusive [a, b) when b > a
    min_len = 2 if strict else 1
    iv = r.cte(
        f"__aj_iv{lookup.step}_{i}",
        f'SELECT {part}, {x} AS "__aj_x", "__aj_a", "__aj_sv" + {w} AS "__aj_b"\n'
        f'    FROM {base} WHERE {x} IS NOT NULL AND "__aj_sv" + {w} - "__aj_a" >= {min_len}',
    )
    touch = ">=" if strict else ">"  # open intervals meeting at a point leave that point out
    prev = (
        f'max("__aj_b") OVER (PARTITION BY {part}, "__aj_x" ORDER BY "__aj_a", "__aj_b" '
        "ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING)"
    )
    flagged = r.cte(
        f"__aj_if{lookup.step}_{i}",
        f'SELECT *, CASE WHEN {prev} IS NULL OR "__aj_a" {touch} {prev} THEN 1 ELSE 0 END '
        f'AS "__aj_new"\n    FROM {iv}',
    )
    numbered = r.cte(
        f"__aj_in{lookup.step}_{i}",
        f'SELECT *, sum("__aj_new") OVER (PARTITION BY {part}, "__aj_x" ORDER BY '
        f'"__aj_a", "__aj_b" ROWS UNBOUNDED PRECEDING) AS "__aj_isl"\n    FROM {flagged}',
    )
    return r.cte(
        f"__aj_is{lookup.step}_{i}",
        f'SELECT {part}, min("__aj_a") AS "__aj_lo", max("__aj_b") AS "__aj_hi"\n'
        f'    FROM {numbered} GROUP BY {part}, "__aj_x", "__aj_isl"',
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
    keys = _keys(lookup)
    part = ", ".join(keys)
    ext = [(i, v) for i, v in enumerate(lookup.values) if v.agg in ("min", "max")]
    ext_cols = sorted({cols.index(v.column) for _, v in ext})
    carry = "".join(f', e."__aj_v{c}"' for c in ext_cols)
    ekeys = ", ".join(f"e.{k}" for k in keys)
    # lo = labels before a row's entry, hi = labels before its exit (ranks are 0-based)
    spans = r.cte(
        f"__aj_sp{lookup.step}",
        f'SELECT {ekeys}, x."__aj_tag" AS "__aj_j", e."__aj_rank" AS "__aj_lo", '
        f'x."__aj_rank" AS "__aj_hi"{carry}\n'
        f'    FROM {swept} AS e JOIN {swept} AS x ON x."__aj_ord" = e."__aj_ord" '
        f'AND x."__aj_tag" >= 0 AND x."__aj_tag" < 1000\n'
        f'    WHERE e."__aj_tag" = -1 AND x."__aj_rank" > e."__aj_rank"',
    )
    lv = r.cte(
        f"__aj_lv{lookup.step}",
        f'SELECT *, ("__aj_lo" + (1 << "__aj_l") - 1) >> "__aj_l" AS "__aj_la", '
        f'"__aj_hi" >> "__aj_l" AS "__aj_ra"\n    FROM (SELECT *, unnest(range(0, '
        f'CAST(floor(log2("__aj_hi" - "__aj_lo")) AS BIGINT) + 2)) AS "__aj_l" '
        f"FROM {spans})",
    )
    aggs = []
    for i, v in ext:
        aggs.append(f'{v.agg}("__aj_v{cols.index(v.column)}") AS "__aj_b{i}"')
    blocks = r.cte(
        f"__aj_bk{lookup.step}",
        f'SELECT {part}, "__aj_j", "__aj_l", "__aj_idx", {", ".join(aggs)}\n    FROM ('
        f'SELECT *, "__aj_la" AS "__aj_idx" FROM {lv} WHERE "__aj_la" < "__aj_ra" '
        f'AND "__aj_la" % 2 = 1\n    UNION ALL SELECT *, "__aj_ra" - 1 FROM {lv} '
        f'WHERE "__aj_la" < "__aj_ra" AND "__aj_ra" % 2 = 1)\n'
        f'    GROUP BY {part}, "__aj_j", "__aj_l", "__aj_idx"',
    )
    # a label of rank r sits in block (level, r >> level) on every level up to log2(labels)
    labels = r.cte(
        f"__aj_lr{lookup.step}",
        f'SELECT *, unnest(range(0, CAST(floor(log2(greatest("__aj_n", 1))) AS BIGINT) + 2)) '
        f'AS "__aj_l"\n    FROM (SELECT {part}, "__aj_row", "__aj_rank" - 1 AS "__aj_r", '
        f'max("__aj_rank") OVER (PARTITION BY {part}) AS "__aj_n"\n'
        f'    FROM {swept} WHERE "__aj_tag" = -2)',
    )
    picks = []
    for i, v in ext:
        j = windows.index(v.over_us)
        picks.append(f'{v.agg}(CASE WHEN b."__aj_j" = {j} THEN b."__aj_b{i}" END) AS "__aj_a{i}"')
    on = " AND ".join(f"b.{k} = l.{k}" for k in keys)
    found = r.cte(
        f"__aj_ex{lookup.step}",
        f'SELECT l."__aj_row", {", ".join(picks)}\n    FROM {labels} AS l JOIN {blocks} AS b '
        f'ON {on} AND b."__aj_l" = l."__aj_l" '
        f'AND b."__aj_idx" = l."__aj_r" >> l."__aj_l"\n    GROUP BY l."__aj_row"',
    )
    picked = "".join(f', x."__aj_a{i}"' for i, _ in ext)
    return (
        f"SELECT t.*{picked}\n    FROM ({body}) AS t "
        f'LEFT JOIN {found} AS x ON x."__aj_row" = t."__aj_row"'
    )
