"""Random point-in-time cases (spec + pandas data) for hypothesis and for seeded loops."""

from __future__ import annotations

import datetime as dt
import importlib
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Protocol, TypeVar

import numpy as np
import pandas as pd
import pyarrow as pa
from hypothesis import strategies as st

if TYPE_CHECKING:
    from collections.abc import Callable, Iterator, Sequence
    from types import ModuleType

__all__ = [
    "AGGREGATES",
    "Case",
    "CaseRecipe",
    "FeatureRecipe",
    "TableRecipe",
    "build_spec",
    "cases",
    "make_data",
    "make_recipe",
    "plain_cases",
    "random_case",
]

T = TypeVar("T")

AGGREGATES = ("count", "count_distinct", "sum", "mean", "min", "max", "std", "last")
NUMERIC = ("v_int", "v_float")
VALUES = ("v_int", "v_float", "v_str")
#: Every generated instant is this plus a small number of minutes, so ties are frequent.
BASE = pd.Timestamp("2024-01-15 00:00:00")
ZONES = ("UTC", "Europe/Paris", "America/New_York", "Asia/Kolkata")
#: Label-side and table-side key columns of each entity, plain and "mapped" (renamed).
ENTITY_KEYS = {"user": ("user_id",), "store": ("region", "store_no")}
MAPPED_KEYS = {"user": ("uid",), "store": ("reg", "shop")}
LABEL_MAPPED_KEYS = {"user": ("buyer_id",), "store": ("region", "store_no")}
WINDOWS = (1, 2, 3, 5, 10, 30, 2 * 24 * 60)  # minutes; the last reaches back over dates


class Draw(Protocol):
    """The few random choices the generator makes; hypothesis and numpy both provide them."""

    def integer(self, lo: int, hi: int) -> int:
        """An integer in [lo, hi]."""
        ...

    def boolean(self, p: float = 0.5) -> bool:
        """True with probability about p (shrinks to False)."""
        ...

    def choice(self, options: Sequence[T]) -> T:
        """One of the options (shrinks to the first)."""
        ...


@dataclass
class HypothesisDraw:
    """Draw through hypothesis, so failing cases shrink."""

    draw: Callable[[st.SearchStrategy[Any]], Any]

    def integer(self, lo: int, hi: int) -> int:
        """An integer in [lo, hi]."""
        return int(self.draw(st.integers(lo, hi)))

    def boolean(self, p: float = 0.5) -> bool:
        """True with probability about p (shrinks to False)."""
        return bool(self.draw(st.integers(0, 99)) >= round((1 - p) * 100))

    def choice(self, options: Sequence[T]) -> T:
        """One of the options (shrinks to the first)."""
        return options[self.integer(0, len(options) - 1)]


@dataclass
class NumpyDraw:
    """Draw from a seeded numpy generator (fast, for thousands of cases)."""

    rng: np.random.Generator

    def integer(self, lo: int, hi: int) -> int:
        """An integer in [lo, hi]."""
        return int(self.rng.integers(lo, hi + 1))

    def boolean(self, p: float = 0.5) -> bool:
        """True with probability p."""
        return bool(self.rng.random() < p)

    def choice(self, options: Sequence[T]) -> T:
        """One of the options."""
        return options[self.integer(0, len(options) - 1)]


# -- recipes: plain data describing a spec, so a case can print itself as code ----------------


@dataclass
class TableRecipe:
    """How one table is declared and how its data is generated."""

    name: str
    time: str
    entities: tuple[str, ...]  # entity names, in declared order
    mapped: bool = False  # declared with the {entity: [columns]} form and renamed columns
    known_at: str | None = None
    delay: int = 0  # minutes
    inclusive: bool = False
    null_times: str = "error"
    time_kind: str = "naive_us"  # naive_us | naive_ns | naive_s | aware:<zone> | date
    key_dtype: str = "Int64"
    null_key_p: float = 0.0
    null_value_p: float = 0.0
    max_rows: int = 40
    is_labels: bool = False

    def key_columns(self, entity: str) -> tuple[str, ...]:
        """This table's columns for an entity."""
        if self.is_labels:
            return LABEL_MAPPED_KEYS[entity] if self.mapped else ENTITY_KEYS[entity]
        return MAPPED_KEYS[entity] if self.mapped else ENTITY_KEYS[entity]


@dataclass
class FeatureRecipe:
    """One Latest or Trailing feature."""

    kind: str  # latest | trailing
    table: str
    columns: tuple[str, ...] = ()  # latest
    column: str | None = None  # trailing
    agg: str = "count"
    over: int = 0  # minutes
    max_age: int | None = None  # minutes
    prefix: str = ""
    name: str | None = None
    entity: str | None = None
    entity_as_object: bool = True  # entity=Entity(...) as in the contract, else its name
    duration_as_text: bool = False  # "5m" rather than a timedelta


@dataclass
class CaseRecipe:
    """A whole spec."""

    labels: TableRecipe
    tables: list[TableRecipe]
    features: list[FeatureRecipe]
    timezone: str | None = None

    def table(self, name: str) -> TableRecipe:
        """A table recipe by name (labels included)."""
        for table in [self.labels, *self.tables]:
            if table.name == name:
                return table
        raise KeyError(name)


def _duration(minutes: int, as_text: bool) -> str | dt.timedelta:
    return f"{minutes}m" if as_text else dt.timedelta(minutes=minutes)


def _duration_code(minutes: int, as_text: bool) -> str:
    return f'"{minutes}m"' if as_text else f"dt.timedelta(minutes={minutes})"


def build_spec(recipe: CaseRecipe, api: ModuleType | None = None) -> Any:
    """Build the spec objects from a recipe with ``api`` (asof_join unless given)."""
    if api is None:
        api = importlib.import_module("asof_join")
    entities = {name: api.Entity(name, keys=list(keys)) for name, keys in ENTITY_KEYS.items()}
    tables: dict[str, Any] = {}
    for table in [recipe.labels, *recipe.tables]:
        declared: Any
        if table.mapped:
            declared = {e: list(table.key_columns(e)) for e in table.entities}
        else:
            declared = [entities[e] for e in table.entities]
        kwargs: dict[str, Any] = {
            "time": table.time,
            "entities": declared,
            "inclusive": table.inclusive,
            "null_times": table.null_times,
        }
        if table.known_at is not None:
            kwargs["known_at"] = table.known_at
        if table.delay:
            kwargs["delay"] = dt.timedelta(minutes=table.delay)
        tables[table.name] = api.EventTable(table.name, **kwargs)
    features = []
    for f in recipe.features:
        extra: dict[str, Any] = {}
        if f.entity is not None:
            extra["entity"] = entities[f.entity] if f.entity_as_object else f.entity
        if f.prefix:
            extra["prefix"] = f.prefix
        if f.name is not None:
            extra["name"] = f.name
        if f.kind == "latest":
            if f.max_age is not None:
                extra["max_age"] = _duration(f.max_age, f.duration_as_text)
            features.append(api.Latest(tables[f.table], list(f.columns), **extra))
        else:
            over = _duration(f.over, f.duration_as_text)
            features.append(api.Trailing(tables[f.table], f.column, f.agg, over=over, **extra))
    kwargs = {"timezone": recipe.timezone} if recipe.timezone is not None else {}
    return api.TrainingSetSpec(labels=tables[recipe.labels.name], features=features, **kwargs)


def spec_code(recipe: CaseRecipe) -> str:
    """Python source that builds the same spec with asof_join."""
    lines = [
        f'{name} = aj.Entity("{name}", keys={list(keys)!r})' for name, keys in ENTITY_KEYS.items()
    ]
    for table in [recipe.labels, *recipe.tables]:
        if table.mapped:
            declared = repr({e: list(table.key_columns(e)) for e in table.entities})
        else:
            declared = "[" + ", ".join(table.entities) + "]"
        args = [f'"{table.name}"', f'time="{table.time}"', f"entities={declared}"]
        if table.known_at is not None:
            args.append(f'known_at="{table.known_at}"')
        if table.delay:
            args.append(f"delay=dt.timedelta(minutes={table.delay})")
        if table.inclusive:
            args.append("inclusive=True")
        if table.null_times != "error":
            args.append(f'null_times="{table.null_times}"')
        lines.append(f"{table.name} = aj.EventTable({', '.join(args)})")
    feats = []
    for f in recipe.features:
        if f.kind == "latest":
            args = [f.table, repr(list(f.columns))]
            if f.max_age is not None:
                args.append(f"max_age={_duration_code(f.max_age, f.duration_as_text)}")
        else:
            args = [f.table, repr(f.column), repr(f.agg)]
            args.append(f"over={_duration_code(f.over, f.duration_as_text)}")
        if f.entity is not None:
            args.append(f"entity={f.entity if f.entity_as_object else repr(f.entity)}")
        if f.prefix:
            args.append(f"prefix={f.prefix!r}")
        if f.name is not None:
            args.append(f"name={f.name!r}")
        feats.append(f"    aj.{'Latest' if f.kind == 'latest' else 'Trailing'}({', '.join(args)}),")
    tz = f", timezone={recipe.timezone!r}" if recipe.timezone is not None else ""
    lines.append(f"spec = aj.TrainingSetSpec(labels={recipe.labels.name}, features=[")
    lines += feats
    lines.append(f"]{tz})")
    return "\n".join(lines)


def _series_code(series: pd.Series) -> str:
    """Source for one column, exact in values and dtype."""
    values: list[Any] = []
    for v in series.astype(object):
        if v is None or v is pd.NA or v is pd.NaT or (isinstance(v, float) and np.isnan(v)):
            values.append(None)
        elif isinstance(v, pd.Timestamp):
            values.append(_Raw(f"pd.Timestamp({str(v)!r})"))
        elif isinstance(v, dt.date):
            values.append(_Raw(f"dt.date({v.year}, {v.month}, {v.day})"))
        elif isinstance(v, np.generic):
            values.append(v.item())
        else:
            values.append(v)
    return f"pd.Series({values!r}, dtype={str(series.dtype)!r})"


@dataclass(frozen=True)
class _Raw:
    """A value whose repr is the given source text."""

    text: str

    def __repr__(self) -> str:
        return self.text


def data_code(data: dict[str, pd.DataFrame]) -> str:
    """Python source that rebuilds the data dict."""
    lines = ["data = {"]
    for name, frame in data.items():
        lines.append(f'    "{name}": pd.DataFrame({{')
        for column in frame.columns:
            lines.append(f'        "{column}": {_series_code(frame[column])},')
        lines.append("    }),")
    lines.append("}")
    return "\n".join(lines)


@dataclass
class Case:
    """A generated case: a spec recipe and its data; unpacks as ``spec, data``."""

    recipe: CaseRecipe
    data: dict[str, pd.DataFrame]
    _spec: Any = field(default=None, repr=False)

    @property
    def spec(self) -> Any:
        """The asof_join spec (built on first use)."""
        if self._spec is None:
            self._spec = build_spec(self.recipe)
        return self._spec

    def __iter__(self) -> Iterator[Any]:
        yield self.spec
        yield self.data

    def code(self) -> str:
        """A runnable reproducer."""
        head = "import datetime as dt\n\nimport pandas as pd\n\nimport asof_join as aj\n\n"
        return head + spec_code(self.recipe) + "\n" + data_code(self.data) + "\n"

    def __repr__(self) -> str:
        return "Case(\n" + self.code() + ")"

    def _repr_pretty_(self, printer: Any, cycle: bool) -> None:
        """Hypothesis prints falsifying examples with this: show the reproducer."""
        printer.text(repr(self))


# -- generation --------------------------------------------------------------------------------


def _time_kinds(d: Draw, n: int, enabled: bool) -> list[str]:
    """Time kind per table (labels first)."""
    if not enabled:
        return ["naive_us"] * n
    options = ["naive_us", "naive_ns", "naive_s", "date", *(f"aware:{z}" for z in ZONES)]
    return [d.choice(options) for _ in range(n)]


def make_recipe(
    d: Draw,
    *,
    latest: bool = True,
    trailing: bool = False,
    time_kinds: bool = False,
    max_labels: int = 30,
    max_rows: int = 40,
) -> CaseRecipe:
    """Draw a spec: 1-3 feature tables, 1-4 features of the allowed kinds."""
    n_tables = d.integer(1, 3)
    kinds = _time_kinds(d, n_tables + 1, time_kinds)
    keep = d.boolean(0.25)
    labels = TableRecipe(
        name="labels",
        time="t",
        entities=("user", "store"),
        mapped=d.boolean(0.3),
        delay=d.choice([0, 0, 1, 2]),
        null_times="keep" if keep else "error",
        time_kind=kinds[0],
        key_dtype=d.choice(["Int64", "int64"]),
        null_key_p=d.choice([0.0, 0.1]),
        null_value_p=d.choice([0.0, 0.2]),
        max_rows=max_labels,
        is_labels=True,
    )
    tables = []
    for i in range(n_tables):
        kind = kinds[i + 1]
        use_known = kind != "date" and d.boolean(0.4)
        tables.append(
            TableRecipe(
                name=f"table_{'abc'[i]}",
                time=d.choice(["s", "valid_at"]),
                entities=d.choice([("user",), ("store",), ("user", "store"), ("store", "user")]),
                mapped=d.boolean(0.3),
                known_at="known" if use_known else None,
                delay=0 if use_known else d.choice([0, 0, 1, 3]),
                inclusive=d.boolean(0.3),
                null_times="skip" if d.boolean(0.25) else "error",
                time_kind=kind,
                key_dtype=d.choice(["Int64", "Int32", "int64", "int32"]),
                null_key_p=d.choice([0.0, 0.1]),
                null_value_p=d.choice([0.0, 0.2, 0.5]),
                max_rows=max_rows,
            )
        )
    aware = any(k.startswith("aware") for k in kinds)
    naive = any(not k.startswith("aware") for k in kinds)
    timezone = d.choice(ZONES) if aware and naive else None
    if time_kinds and timezone is None and d.boolean(0.2):
        timezone = d.choice(ZONES)  # allowed even when nothing is mixed

    sources = [t.name for t in tables]
    if not keep:
        sources.append("labels")  # features over the label table itself
    allowed = [k for k, on in (("latest", latest), ("trailing", trailing)) if on]
    features = []
    for i in range(d.integer(1, 4)):
        source = d.choice(sources)
        recipe = labels if source == "labels" else tables[sources.index(source)]
        entity = None
        if len(recipe.entities) > 1 and d.boolean(0.4):
            entity = d.choice(recipe.entities)
        common: dict[str, Any] = {
            "table": source,
            "entity": entity,
            "entity_as_object": d.boolean(0.5),
            "duration_as_text": d.boolean(0.3),
        }
        if d.choice(allowed) == "latest":
            columns = [c for c in VALUES if d.boolean(0.5)] or [d.choice(VALUES)]
            if d.boolean(0.3):
                columns.reverse()
            single_name = len(columns) == 1 and d.boolean(0.3)
            features.append(
                FeatureRecipe(
                    kind="latest",
                    columns=tuple(columns),
                    max_age=d.choice([1, 2, 3, 5, 8]) if d.boolean(0.3) else None,
                    prefix="" if single_name else f"f{i}_",
                    name=f"f{i}" if single_name else None,
                    **common,
                )
            )
        else:
            agg = d.choice(AGGREGATES)
            if agg == "count" and d.boolean(0.4):
                column = None
            elif agg in ("sum", "mean", "std"):
                column = d.choice(NUMERIC)
            else:
                column = d.choice(VALUES)
            use_name = d.boolean(0.5)
            features.append(
                FeatureRecipe(
                    kind="trailing",
                    column=column,
                    agg=agg,
                    over=d.choice(WINDOWS),
                    prefix="" if use_name else f"f{i}_{agg}_",
                    name=f"f{i}_{agg}" if use_name else None,
                    **common,
                )
            )
    used = {f.table for f in features}  # data= must bind only the tables the spec declares
    tables = [t for t in tables if t.name in used]
    return CaseRecipe(labels=labels, tables=tables, features=features, timezone=timezone)


def _instant(minutes: int, recipe: CaseRecipe) -> pd.Timestamp:
    """The UTC instant of 'minutes after BASE' on the spec's shared clock."""
    return BASE.tz_localize(recipe.timezone or "UTC").tz_convert("UTC") + pd.Timedelta(
        minutes=minutes
    )


def _time_column(minutes: list[int | None], kind: str, recipe: CaseRecipe, d: Draw) -> pd.Series:
    """Render minutes on the shared clock in a table's time kind."""
    if kind == "date":
        # midnight of BASE's day, up to two days before or (labels only) the day after:
        # many ties, and edges at minute 0
        dates = [
            None if x is None else (BASE - pd.Timedelta(days=(20 - x) // 8)).date() for x in minutes
        ]
        if any(x is not None for x in dates) and d.boolean(0.5):
            return pd.Series(dates, dtype=object)  # plain datetime.date objects
        return pd.Series(dates, dtype=pd.ArrowDtype(pa.date32()))  # typed even when empty
    if kind.startswith("aware:"):
        zone = kind.split(":", 1)[1]
        stamps = [None if x is None else _instant(x, recipe).tz_convert(zone) for x in minutes]
        return pd.Series(stamps, dtype=f"datetime64[us, {zone}]")
    wall = [None if x is None else BASE + pd.Timedelta(minutes=x) for x in minutes]
    if kind == "naive_ns":
        # sub-microsecond noise: truncated to microseconds, so it must not break ties
        wall = [None if w is None else w + pd.Timedelta(d.integer(0, 999), "ns") for w in wall]
        return pd.Series(wall, dtype="datetime64[ns]")
    unit = "s" if kind == "naive_s" else "us"
    return pd.Series(wall, dtype=f"datetime64[{unit}]")


def _maybe(d: Draw, p: float, value: T) -> T | None:
    return None if p and d.boolean(p) else value


def _int_column(values: list[int | None], dtype: str) -> pd.Series:
    if any(v is None for v in values) and dtype[0] == "i":
        dtype = "I" + dtype[1:]  # nulls need the nullable dtype
    return pd.Series(values, dtype=dtype)


def _table_frame(
    d: Draw, table: TableRecipe, recipe: CaseRecipe, key_offset: int, n_rows: int | None
) -> pd.DataFrame:
    n = d.integer(0, table.max_rows) if n_rows is None else n_rows
    columns: dict[str, pd.Series] = {}
    p_key = table.null_key_p
    for entity in table.entities:
        names = table.key_columns(entity)
        if entity == "user":
            users = [_maybe(d, p_key, d.integer(1, 3) + key_offset) for _ in range(n)]
            columns[names[0]] = _int_column(users, table.key_dtype)
        else:
            regions = [_maybe(d, p_key, d.choice(["n", "s"])) for _ in range(n)]
            stores = [_maybe(d, p_key, d.integer(1, 2) + key_offset) for _ in range(n)]
            columns[names[0]] = pd.Series(regions, dtype="str")
            columns[names[1]] = _int_column(stores, table.key_dtype)
    hi = 25 if table.is_labels else 20
    null_time_p = 0.15 if table.null_times in ("skip", "keep") else 0.0
    minutes = [_maybe(d, null_time_p, d.integer(0, hi)) for _ in range(n)]
    columns[table.time] = _time_column(minutes, table.time_kind, recipe, d)
    if table.known_at is not None:
        # known before valid (clipped to it), equal, or later: a correction landing late
        known: list[int | None] = [
            d.integer(0, 20) if x is None else x + d.integer(-3, 6) for x in minutes
        ]
        columns[table.known_at] = _time_column(known, table.time_kind, recipe, d)
    p = table.null_value_p
    ints = [_maybe(d, p, d.integer(-2, 5)) for _ in range(n)]
    columns["v_int"] = _int_column(ints, "Int64" if p else "int64")
    columns["v_float"] = pd.Series(
        [_maybe(d, p, d.integer(-8, 20) / 4) for _ in range(n)], dtype="float64"
    )
    columns["v_str"] = pd.Series(
        [_maybe(d, p, d.choice(["a", "b", "c"])) for _ in range(n)], dtype="str"
    )
    if table.is_labels:
        columns["y"] = pd.Series([d.integer(0, 1) for _ in range(n)], dtype="int64")
    return pd.DataFrame(columns)


def make_data(
    d: Draw, recipe: CaseRecipe, *, key_offset: int = 0, n_labels: int | None = None
) -> dict[str, pd.DataFrame]:
    """Draw the frames of a recipe. ``key_offset`` moves every integer key (for batching)."""
    data = {recipe.labels.name: _table_frame(d, recipe.labels, recipe, key_offset, n_labels)}
    for table in recipe.tables:
        data[table.name] = _table_frame(d, table, recipe, key_offset, None)
    return data


@st.composite
def cases(
    draw: st.DrawFn,
    *,
    latest: bool = True,
    trailing: bool = False,
    time_kinds: bool = False,
    max_labels: int = 30,
    max_rows: int = 40,
) -> Case:
    """Hypothesis strategy: a small spec and data exercising every rule of the semantics.

    Integer minutes on one clock make duplicate timestamps, ties on (key, s, k), window edges
    exactly at t - w and max_age edges common. Each table has a random mix of null keys, null
    values, known_at before and after the valid time, delays, inclusive visibility, null valid
    times (skipped), one- or two-column entity keys, renamed key columns, and rows in random
    order. ``time_kinds`` adds units, time zones and dates.
    """
    d = HypothesisDraw(draw)
    recipe = make_recipe(
        d,
        latest=latest,
        trailing=trailing,
        time_kinds=time_kinds,
        max_labels=max_labels,
        max_rows=max_rows,
    )
    return Case(recipe, make_data(d, recipe))


def random_case(rng: np.random.Generator, **options: Any) -> Case:
    """The same generator driven by numpy: for fast seeded loops over many cases."""
    d = NumpyDraw(rng)
    recipe = make_recipe(d, **options)
    return Case(recipe, make_data(d, recipe))


# -- plain cases for the reference libraries ---------------------------------------------------


@dataclass
class PlainCase:
    """One key column, unique valid times per key: where every as-of join agrees."""

    labels: pd.DataFrame  # key, t, label_no
    rows: pd.DataFrame  # key, s, value
    inclusive: bool
    max_age: int | None  # minutes

    def spec(self) -> Any:
        """The asof_join spec for this case."""
        aj = importlib.import_module("asof_join")
        key = aj.Entity("key", keys=["key"])
        labels = aj.EventTable("labels", time="t", entities=[key])
        rows = aj.EventTable("rows", time="s", entities=[key], inclusive=self.inclusive)
        max_age = None if self.max_age is None else dt.timedelta(minutes=self.max_age)
        feature = aj.Latest(rows, ["value"], max_age=max_age)
        return aj.TrainingSetSpec(labels=labels, features=[feature])

    @property
    def data(self) -> dict[str, pd.DataFrame]:
        """The data dict for aj.build."""
        return {"labels": self.labels, "rows": self.rows}


@st.composite
def plain_cases(draw: st.DrawFn) -> PlainCase:
    """Labels and one feature table keyed by one int column, unique times per key."""
    n_keys = draw(st.integers(1, 4))
    label_rows = draw(
        st.lists(st.tuples(st.integers(0, n_keys - 1), st.integers(0, 60)), max_size=30)
    )
    row_times = draw(
        st.lists(
            st.tuples(st.integers(0, n_keys - 1), st.integers(0, 60)),
            max_size=40,
            unique=True,  # unique (key, s): no ties, so every tie-breaking rule agrees
        )
    )
    values = draw(st.lists(st.floats(-100, 100, width=32), min_size=len(row_times)))
    labels = pd.DataFrame(
        {
            "key": pd.Series([k for k, _ in label_rows], dtype="int64"),
            "t": pd.Series(
                [BASE + pd.Timedelta(minutes=x) for _, x in label_rows], dtype="datetime64[us]"
            ),
            "label_no": pd.Series(range(len(label_rows)), dtype="int64"),
        }
    )
    rows = pd.DataFrame(
        {
            "key": pd.Series([k for k, _ in row_times], dtype="int64"),
            "s": pd.Series(
                [BASE + pd.Timedelta(minutes=x) for _, x in row_times], dtype="datetime64[us]"
            ),
            "value": pd.Series(values[: len(row_times)], dtype="float64"),
        }
    )
    inclusive = draw(st.booleans())
    max_age = draw(st.one_of(st.none(), st.integers(1, 20)))
    return PlainCase(labels, rows, inclusive, max_age)
