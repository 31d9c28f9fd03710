"""backfill(): feature snapshots on a time grid, written as crash-safe hive partitions."""

from __future__ import annotations

import contextlib
import datetime as dt
import hashlib
import json
import os
import shutil
import sys
import time
import uuid
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any
from urllib.parse import unquote

from . import __version__
from .durations import format_duration, parse_duration, to_micros
from .errors import ColumnNotFoundError, InputError, SpecError, UnknownTableError
from .spec import EntityRef, EventTable, Latest, Trailing, TrainingSetSpec

if TYPE_CHECKING:
    import duckdb
    import pyarrow as pa

    from .engines.duckdb import DuckDBEngine
    from .spec import Feature

__all__ = ["AS_OF", "MANIFEST", "BackfillResult", "backfill"]

#: The snapshot-time column: the hive partition key (``out/as_of=<T>/``), not stored in files.
AS_OF = "as_of"
#: The manifest: fingerprint, grid and rows per partition, replaced atomically.
MANIFEST = "_manifest.json"
#: Held with ``fcntl.flock`` while a run writes; holds the writer's pid.
LOCK = ".backfill.lock"
#: The one data file of a partition.
PART = "part-0.parquet"
#: Scratch folders (one per run; stale ones are removed when the next run starts).
TMP_PREFIX = ".tmp-"
FORMAT = "asof_join.backfill/1"
#: Test hook: seconds to sleep before and after each partition's rename, so that a test's
#: SIGKILL lands in the middle of writing. Never set it outside tests.
SLEEP_ENV = "ASOF_JOIN_BACKFILL_TEST_SLEEP"
#: With chunk=None, snapshot times per query are chosen to give about this many spine rows.
CHUNK_ROWS = 4_000_000

_PARTITION_PREFIX = f"{AS_OF}="
_DAY = dt.timedelta(days=1)
_EPOCH = dt.datetime(1970, 1, 1)
_EPOCH_UTC = dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc)


@dataclass(frozen=True)
class BackfillResult:
    """What a backfill run did: the partitions it wrote and those that were already there."""

    out: Path
    fingerprint: str
    written: tuple[str, ...]  #: partition folder names written by this run, in time order
    skipped: tuple[str, ...]  #: partitions of the requested grid that were already finished
    rows: int  #: rows written by this run

    def __str__(self) -> str:
        return (
            f"backfill {self.out}: wrote {len(self.written)} partition(s), {self.rows:,} rows; "
            f"{len(self.skipped)} already finished (fingerprint {self.fingerprint})"
        )


def backfill(
    spec_or_features: TrainingSetSpec | Feature | Sequence[Feature],
    data: Mapping[str, object] | None = None,
    *,
    start: object,
    end: object,
    every: str | dt.timedelta = "1d",
    out: str | os.PathLike[str] = "snapshots/",
    population: object = None,
    overwrite: bool = False,
    memory_limit: str | None = None,
    temp_dir: str | os.PathLike[str] | None = None,
    threads: int | None = None,
    progress: bool | None = None,
    chunk: int | None = None,
    timezone: str | None = None,
    wait: bool = False,
) -> BackfillResult:
    """Write the features as of each time on a grid, one Parquet partition per snapshot time.

    For each snapshot time T in ``start, start + every, ...`` up to and including ``end``,
    partition ``out/as_of=<T>/part-0.parquet`` holds one row per entity key with the features
    as of T, under the same semantics as ``build()`` (a row is visible when its known time is
    before T, or at T for ``inclusive`` tables). The keys are every key with a visible row at T
    in any of the features' tables, or, when given, every key of ``population`` at every T.
    Files hold the key columns and the features; T is in the folder name (an ISO date for
    whole-day grids, else an ISO timestamp with ``:`` written ``%3A``, which hive readers
    decode). Read the folder with DuckDB
    (``read_parquet('out/*/*.parquet', hive_partitioning=true)``), polars
    (``pl.read_parquet('out/*/*.parquet', hive_partitioning=True)``) or pyarrow
    (``pyarrow.dataset.dataset('out', partitioning='hive')``).

    Runs are incremental and crash-safe: finished partitions are skipped, so extending ``end``
    writes only the new ones; each file is written aside and renamed into place, and
    ``out/_manifest.json`` (fingerprint, grid, rows per partition) is replaced atomically after
    each partition, so a run killed at any moment and started again ends with the files of an
    uninterrupted run. A folder written for another spec or population (another fingerprint)
    or on another grid is an ``InputError`` unless ``overwrite=True``, which deletes its
    partitions first. One run writes a folder at a time (``fcntl.flock`` on
    ``out/.backfill.lock``); a second fails at once, or queues with ``wait=True``.

    Args:
        spec_or_features: a TrainingSetSpec (its features; of its label table only the entity
            mapping is used) or a list of Latest/Trailing features. All features must be keyed
            by the same entities.
        data: table name -> frame, DuckDB relation or Parquet/CSV path, as for ``build()``.
            Bindings of tables no feature reads (such as a spec's label table) are ignored.
        start: the first snapshot time (datetime, date, ISO string, pandas Timestamp). Aware
            times are instants (partition names are then in UTC).
        end: the last snapshot time, included when it lies on the grid.
        every: the grid step, such as ``"1d"`` or ``"6h"``.
        out: the output folder (created when missing).
        population: a frame (or Parquet/CSV path) whose key columns list the keys of every
            snapshot; duplicates are dropped, null keys are an error. It is part of the
            fingerprint.
        overwrite: delete the folder's partitions and write afresh.
        memory_limit: DuckDB memory limit such as ``"2GB"``; larger chunks spill to disk.
        temp_dir: where DuckDB spills (default: the run's scratch folder inside ``out``).
        threads: DuckDB worker threads.
        progress: show a tqdm progress bar of partitions; default: when stderr is a terminal.
        chunk: snapshot times per query; default: about 4 million rows per query.
        timezone: the zone naive times are read in when naive and aware times are mixed
            (default: the spec's).
        wait: when another run holds the folder, wait for it instead of failing.

    Returns:
        A BackfillResult naming the partitions written and skipped.

    Example:
        >>> import tempfile, pandas as pd, asof_join as aj
        >>> customer = aj.Entity("customer", keys=["customer_id"])
        >>> tiers = aj.EventTable("tiers", time="at", entities=[customer])
        >>> t = pd.DataFrame({"customer_id": [1, 1, 2], "tier": ["seed", "bloom", "seed"],
        ...                   "at": pd.to_datetime(["2024-01-01", "2024-01-03", "2024-01-02"])})
        >>> out = tempfile.mkdtemp()
        >>> done = aj.backfill([aj.Latest(tiers, ["tier"])], data={"tiers": t},
        ...                    start="2024-01-02", end="2024-01-04", out=out, progress=False)
        >>> done.written
        ('as_of=2024-01-02', 'as_of=2024-01-03', 'as_of=2024-01-04')
        >>> pd.read_parquet(out + "/as_of=2024-01-04/part-0.parquet")["tier"].tolist()
        ['bloom', 'seed']
    """
    target = _target(spec_or_features, timezone)
    grid = _Grid.make(start, end, every)
    if chunk is not None and (not isinstance(chunk, int) or chunk < 1):
        msg = f"chunk must be a positive number of snapshot times per query, got {chunk!r}"
        raise SpecError(msg)
    inputs = _inputs(target, data)
    folder = _Folder(Path(out))
    show = sys.stderr.isatty() if progress is None else bool(progress)
    with (
        folder.locked(wait=wait),
        _Session(target, inputs, grid, folder, memory_limit, temp_dir, threads) as session,
    ):
        session.load_population(population)
        fingerprint = session.fingerprint()
        state = folder.reconcile(target, grid, fingerprint, session.population, overwrite)
        if state.pending or state.changed:
            session.check_inputs()
        folder.apply(state)
        written: list[str] = []
        rows = 0
        if state.pending:
            for name, count in session.run(state, chunk, show):
                written.append(name)
                rows += count
    return BackfillResult(
        out=folder.out,
        fingerprint=fingerprint,
        written=tuple(written),
        skipped=state.done,
        rows=rows,
    )


# --- what to compute ----------------------------------------------------------------------------


@dataclass(frozen=True)
class _Target:
    """The synthetic spec (its label table is the spine of keys x snapshot times), its keys."""

    spec: TrainingSetSpec
    keys: tuple[str, ...]

    @property
    def label(self) -> str:
        return self.spec.labels.name

    @property
    def features(self) -> list[str]:
        return self.spec.output_columns()


def _describe(feat: Feature) -> str:
    if isinstance(feat, Latest):
        return f"Latest({feat.table.name!r}, {list(feat.columns)})"
    return f"Trailing({feat.table.name!r}, {feat.column!r}, {feat.agg!r})"


def _target(spec_or_features: object, timezone: str | None) -> _Target:
    """Check the features share one entity key set; make the spec build() runs on the spine."""
    labels: EventTable | None = None
    if isinstance(spec_or_features, TrainingSetSpec):
        features: tuple[Feature, ...] = tuple(spec_or_features.features)
        labels = spec_or_features.labels
        timezone = timezone or spec_or_features.timezone
        declared = frozenset(spec_or_features.tables())
    elif isinstance(spec_or_features, (Latest, Trailing)):
        features = (spec_or_features,)
        declared = frozenset()
    elif isinstance(spec_or_features, Sequence) and not isinstance(spec_or_features, str):
        features = tuple(spec_or_features)
        bad = [f for f in features if not isinstance(f, (Latest, Trailing))]
        if bad:
            msg = (
                f"backfill() takes a TrainingSetSpec or a list of Latest/Trailing features; "
                f"the list holds a {type(bad[0]).__name__}"
            )
            raise SpecError(msg)
        declared = frozenset()
    else:
        msg = (
            "backfill() takes a TrainingSetSpec (or aj.load_spec(path)) or a list of "
            f"Latest/Trailing features, got {type(spec_or_features).__name__}"
        )
        raise SpecError(msg)
    if not features:
        msg = "backfill() needs at least one feature; the spec or list has none"
        raise SpecError(msg)

    columns: dict[str, tuple[str, ...]] = {}  # entity -> spine (label-side) key columns
    entity_keys: dict[str, tuple[str, ...]] = {}  # entity -> its own key names
    sets: list[tuple[str, ...]] = []
    for feat in features:
        refs = feat.table.entities
        if feat.entity is not None:
            refs = tuple(r for r in refs if r.entity == feat.entity)
        if not refs:
            msg = (
                f"{_describe(feat)} is keyed by no entity (its table {feat.table.name!r} "
                f"declares {[r.entity for r in feat.table.entities]}); backfill needs keyed "
                "features: fix entities= on the table or entity= on the feature"
            )
            raise SpecError(msg)
        for ref in refs:
            mine = labels.columns_for(ref.entity) if labels is not None else None
            mine = mine or ref.keys or ref.columns
            known = columns.setdefault(ref.entity, tuple(mine))
            entity_keys.setdefault(ref.entity, tuple(ref.keys or ref.columns))
            if known != tuple(mine):
                msg = (
                    f"entity {ref.entity!r} is keyed by {list(known)} in one feature and by "
                    f"{list(mine)} in {_describe(feat)}; declare the entity once (aj.Entity) "
                    "so every table maps the same key names"
                )
                raise SpecError(msg)
        sets.append(tuple(sorted(r.entity for r in refs)))
    if len(set(sets)) > 1:
        first, other = 0, next(i for i, s in enumerate(sets) if s != sets[0])
        msg = (
            "backfill writes one row per entity key, so every feature must be keyed by the same "
            f"entities: {_describe(features[first])} is keyed by {list(sets[first])} but "
            f"{_describe(features[other])} by {list(sets[other])}; set entity= on features "
            "whose table carries several entities, or backfill each entity's features into "
            "its own folder"
        )
        raise SpecError(msg)

    order = list(dict.fromkeys(e for f in features for e in _entities_of(f)))
    keys = tuple(c for e in order for c in columns[e])
    taken = {f.table.name for f in features} | set(declared)
    label = "snapshot"
    n = 1
    while label in taken:
        n += 1
        label = f"snapshot_{n}"
    spine = EventTable(
        label,
        time=AS_OF,
        entities=[EntityRef(entity=e, columns=columns[e], keys=entity_keys[e]) for e in order],
    )
    spec = TrainingSetSpec(labels=spine, features=features, timezone=timezone)
    return _Target(spec=spec, keys=keys)


def _entities_of(feat: Feature) -> list[str]:
    refs = feat.table.entities
    return [r.entity for r in refs if feat.entity is None or r.entity == feat.entity]


def _as_arrow(obj: object) -> object:
    """Frames and relations as Arrow tables (converted once, not once per chunk); paths as is."""
    import pyarrow as pa

    module = type(obj).__module__.split(".")[0]
    if module == "pandas" and type(obj).__name__ == "DataFrame":
        return pa.Table.from_pandas(obj, preserve_index=False)
    if module == "polars":
        frame: Any = obj.collect() if type(obj).__name__ == "LazyFrame" else obj  # type: ignore[attr-defined]  # a polars LazyFrame
        return frame.to_arrow()
    if module == "duckdb" and hasattr(obj, "to_arrow_table"):
        return obj.to_arrow_table()
    if isinstance(obj, pa.RecordBatchReader):
        return obj.read_all()
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    return obj


def _inputs(target: _Target, data: Mapping[str, object] | None) -> dict[str, object]:
    """The bindings the features read, frames converted once; other bindings are ignored."""
    tables = {n: t for n, t in target.spec.tables().items() if n != target.label}
    data = data or {}
    out: dict[str, object] = {}
    for name, table in tables.items():
        if name in data:
            out[name] = _as_arrow(data[name])
        elif table.path is not None:
            out[name] = table.path
    missing = [n for n in tables if n not in out]
    if missing:
        unused = [n for n in data if n not in tables]
        hint = f" ({list(unused)} bound too, but no feature reads them)" if unused else ""
        msg = (
            f"no data for table(s) {missing}, which the features read: pass "
            f"data={{{missing[0]!r}: frame_or_path}}, or set path: on the table{hint}"
        )
        raise UnknownTableError(msg, table=missing[0])
    return out


# --- the grid -----------------------------------------------------------------------------------


def _instant(value: object, what: str) -> dt.datetime:
    """A snapshot time as a datetime in microseconds: naive, or aware in UTC."""
    import pandas as pd

    if isinstance(value, dt.datetime) and not isinstance(value, pd.Timestamp):
        out = value
    elif isinstance(value, dt.date) and not isinstance(value, dt.datetime):
        out = dt.datetime(value.year, value.month, value.day)
    else:
        ts: Any = None
        with contextlib.suppress(TypeError, ValueError):
            ts = pd.Timestamp(value)  # type: ignore[arg-type]  # str, numpy, pandas values
        if ts is None or pd.isna(ts):
            msg = (
                f"{what}={value!r} is not a time; pass a datetime, a date or an ISO string such "
                "as '2024-01-31' or '2024-01-31T06:00'"
            )
            raise SpecError(msg)
        out = ts.floor("us").to_pydatetime()
    if out.tzinfo is not None:
        out = out.astimezone(dt.timezone.utc)
    return out


def _iso(t: dt.datetime) -> str:
    """ISO 8601 text of a snapshot time; aware times in UTC with a 'Z'."""
    text = t.replace(tzinfo=None).isoformat(timespec="microseconds" if t.microsecond else "seconds")
    return text + "Z" if t.tzinfo is not None else text


def _parse_iso(text: str) -> dt.datetime:
    out = dt.datetime.fromisoformat(text.removesuffix("Z") + ("+00:00" if text[-1:] == "Z" else ""))
    return out.astimezone(dt.timezone.utc) if out.tzinfo is not None else out


def _micros(t: dt.datetime) -> int:
    return to_micros(t - (_EPOCH_UTC if t.tzinfo is not None else _EPOCH))


@dataclass(frozen=True)
class _Grid:
    """start, start + every, ... (count times): the snapshot times of one run."""

    start: dt.datetime
    every: dt.timedelta
    count: int

    @classmethod
    def make(cls, start: object, end: object, every: object) -> _Grid:
        t0, t1 = _instant(start, "start"), _instant(end, "end")
        try:
            step = parse_duration(every, what="every")
        except ValueError as err:
            raise SpecError(str(err)) from None
        if not step:
            msg = "every must be a positive duration such as '1d' or '6h', got zero"
            raise SpecError(msg)
        if (t0.tzinfo is None) != (t1.tzinfo is None):
            msg = (
                f"start {_iso(t0)!r} and end {_iso(t1)!r} mix naive and timezone-aware times; "
                "give both in the same kind"
            )
            raise SpecError(msg)
        if t1 < t0:
            msg = f"end {_iso(t1)!r} is before start {_iso(t0)!r}; swap them"
            raise SpecError(msg)
        return cls(t0, step, to_micros(t1 - t0) // to_micros(step) + 1)

    @property
    def aware(self) -> bool:
        return self.start.tzinfo is not None

    @property
    def end(self) -> dt.datetime:
        return self.at(self.count - 1)

    @property
    def whole_days(self) -> bool:
        """Every time is a midnight (in UTC when aware): partitions are named by dates."""
        midnight = self.start.replace(hour=0, minute=0, second=0, microsecond=0)
        return self.start == midnight and to_micros(self.every) % to_micros(_DAY) == 0

    def at(self, i: int) -> dt.datetime:
        return self.start + self.every * i

    def index(self, t: dt.datetime) -> int:
        """The step of a time on this grid."""
        if self.aware and t.tzinfo is None:
            t = t.replace(tzinfo=dt.timezone.utc)
        return to_micros(t - self.start) // to_micros(self.every)

    def name(self, i: int) -> str:
        """The partition folder of the i-th time: as_of=2024-01-31 or as_of=...T06%3A00%3A00."""
        t = self.at(i)
        value = t.date().isoformat() if self.whole_days else _iso(t).replace(":", "%3A")
        return _PARTITION_PREFIX + value

    def document(self) -> dict[str, Any]:
        return {
            "start": _iso(self.start),
            "end": _iso(self.end),
            "every": format_duration(self.every),
            "timezone_aware": self.aware,
        }

    @classmethod
    def from_document(cls, doc: Mapping[str, Any]) -> _Grid:
        start, end = _parse_iso(doc["start"]), _parse_iso(doc["end"])
        every = parse_duration(doc["every"])
        return cls(start, every, to_micros(end - start) // to_micros(every) + 1)

    def clash(self, other: _Grid) -> bool:
        """The grids are not the same lattice: another step, phase or kind of time."""
        if self.every != other.every or self.aware != other.aware:
            return True
        return to_micros(other.start - self.start) % to_micros(self.every) != 0

    def union(self, other: _Grid) -> _Grid:
        start = min(self.start, other.start)
        end = max(self.end, other.end)
        return _Grid(start, self.every, to_micros(end - start) // to_micros(self.every) + 1)


def partition_time(name: str) -> dt.datetime:
    """The snapshot time a partition folder name stands for (``as_of=...``)."""
    value = unquote(name.removeprefix(_PARTITION_PREFIX))
    if len(value) == 10:
        return dt.datetime.fromisoformat(value)
    return _parse_iso(value)


# --- the folder ---------------------------------------------------------------------------------


@dataclass
class _State:
    """What a run will do to the folder: the manifest to write, partitions to drop and write.

    Indices count steps from the start of the folder's grid (the union of every run's grid).
    """

    manifest: dict[str, Any]
    grid: _Grid  #: the folder's grid
    pending: list[int]  #: times of this run's grid without a finished partition
    inflight: list[int]  #: the chunk a killed run was writing: rebuilt whole, first
    drop: list[str]
    changed: bool
    done: tuple[str, ...] = field(default=())  #: this run's partitions already finished


class _Folder:
    """The output folder: its lock, manifest, partitions and scratch folder."""

    def __init__(self, out: Path) -> None:
        self.out = out
        self._tmp: Path | None = None
        self._manifest_text: str | None = None

    @contextlib.contextmanager
    def locked(self, *, wait: bool) -> Iterator[None]:
        """Hold the folder's lock (fcntl.flock); fail naming the holder's pid, or wait."""
        try:
            import fcntl
        except ImportError:  # pragma: no cover - Windows
            msg = "backfill() locks its folder with fcntl.flock, which needs a POSIX system"
            raise InputError(msg) from None
        self.out.mkdir(parents=True, exist_ok=True)
        fd = os.open(self.out / LOCK, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | (0 if wait else fcntl.LOCK_NB))
            except BlockingIOError:
                holder = os.pread(fd, 32, 0).decode(errors="replace").strip() or "unknown"
                msg = (
                    f"another backfill (pid {holder}) is writing to {str(self.out)!r}; wait for "
                    "it to finish, pass wait=True to queue behind it, or write another folder"
                )
                raise InputError(msg, value=holder) from None
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
            self._clean_stale()
            try:
                yield
            finally:
                if self._tmp is not None:
                    shutil.rmtree(self._tmp, ignore_errors=True)
                    self._tmp = None
        finally:
            os.close(fd)  # releases the lock

    def _clean_stale(self) -> None:
        """Remove scratch folders of killed runs, and partition folders left empty by them."""
        for entry in os.scandir(self.out):
            if entry.name.startswith(TMP_PREFIX) and entry.is_dir(follow_symlinks=False):
                shutil.rmtree(entry.path, ignore_errors=True)
            elif entry.name.startswith(_PARTITION_PREFIX) and entry.is_dir(follow_symlinks=False):
                with contextlib.suppress(OSError):  # not empty: left alone
                    os.rmdir(entry.path)

    @property
    def tmp(self) -> Path:
        """This run's scratch folder inside ``out`` (same file system: renames are atomic)."""
        if self._tmp is None:
            self._tmp = self.out / f"{TMP_PREFIX}{uuid.uuid4().hex}"
            self._tmp.mkdir()
        return self._tmp

    def partitions(self) -> dict[str, Path]:
        """Finished partitions on disk: folder name -> its file."""
        found: dict[str, Path] = {}
        for entry in os.scandir(self.out):
            if entry.name.startswith(_PARTITION_PREFIX) and entry.is_dir(follow_symlinks=False):
                part = Path(entry.path) / PART
                if part.is_file():
                    found[entry.name] = part
        return found

    def read_manifest(self) -> dict[str, Any] | None:
        path = self.out / MANIFEST
        try:
            text = path.read_text(encoding="utf-8")
        except FileNotFoundError:
            return None
        try:
            doc = json.loads(text)
            ok = isinstance(doc, dict) and doc.get("format") == FORMAT
        except json.JSONDecodeError:
            ok = False
        if not ok:
            msg = (
                f"{str(path)!r} is not a backfill manifest ({FORMAT}); point out= at another "
                "folder, or delete the file if the folder holds nothing you need"
            )
            raise InputError(msg)
        self._manifest_text = text
        return doc  # type: ignore[no-any-return]

    def reconcile(
        self,
        target: _Target,
        grid: _Grid,
        fingerprint: str,
        population: dict[str, Any] | None,
        overwrite: bool,
    ) -> _State:
        """Compare the folder with this run; decide what to keep, drop and write (no writes)."""
        import pyarrow.parquet as pq

        saved = self.read_manifest()
        on_disk = self.partitions()
        kept: dict[str, dict[str, Any]] = {}
        drop: list[str] = []
        folder_grid = grid
        if not overwrite:
            if saved is not None and saved.get("fingerprint") != fingerprint:
                msg = (
                    f"{str(self.out)!r} holds snapshots with fingerprint "
                    f"{saved.get('fingerprint')!r}, but this run's spec and population have "
                    f"fingerprint {fingerprint!r}; pass overwrite=True to replace them, or "
                    "write to another folder"
                )
                raise InputError(msg, value=saved.get("fingerprint"))
            if saved is not None:
                old = _Grid.from_document(saved["grid"])
                if old.clash(grid):
                    msg = (
                        f"{str(self.out)!r} holds a grid every {format_duration(old.every)} "
                        f"from {_iso(old.start)} ({'aware' if old.aware else 'naive'} times); "
                        f"this run asks every {format_duration(grid.every)} from "
                        f"{_iso(grid.start)} ({'aware' if grid.aware else 'naive'}); use the "
                        "same grid, another folder, or overwrite=True"
                    )
                    raise InputError(msg)
                folder_grid = old.union(grid)
                kept = {n: e for n, e in saved.get("partitions", {}).items() if n in on_disk}
            for name in sorted(set(on_disk) - set(kept)):
                meta = pq.read_metadata(on_disk[name])
                found = (meta.metadata or {}).get(b"asof_join.fingerprint", b"").decode()
                if found == fingerprint:
                    # renamed into place by a run killed before its manifest update
                    as_of = (meta.metadata or {}).get(b"asof_join.as_of", b"").decode()
                    t = _parse_iso(as_of) if as_of else partition_time(name)
                    kept[name] = _entry(name, t, meta.num_rows)
                elif saved is not None:
                    drop.append(name)  # left by an overwrite that was killed midway
                else:
                    msg = (
                        f"{str(self.out)!r} holds partition {name!r} written for fingerprint "
                        f"{found or 'none'!r} (this run: {fingerprint!r}) and no manifest; pass "
                        "overwrite=True to replace its partitions, or write to another folder"
                    )
                    raise InputError(msg)
        else:
            drop = sorted(on_disk)
        offset = to_micros(grid.start - folder_grid.start) // to_micros(grid.every)
        pending = [offset + i for i in range(grid.count) if grid.name(i) not in kept]
        inflight: list[int] = []
        if not overwrite and saved is not None:
            names = (saved.get("inflight") or {}).get("partitions", [])
            inflight = [folder_grid.index(partition_time(n)) for n in names]
            if all(n in kept for n in names):
                inflight = []
        manifest = {
            "format": FORMAT,
            "fingerprint": fingerprint,
            "spec_fingerprint": target.spec.fingerprint(),
            "population": population,
            "keys": list(target.keys),
            "features": target.features,
            "grid": folder_grid.document(),
            "partitions": dict(sorted(kept.items())),
            "inflight": {"partitions": [folder_grid.name(i) for i in inflight]}
            if inflight
            else None,
            "spec": target.spec.to_document(with_paths=False),
            "asof_join_version": __version__,
        }
        changed = bool(drop) or _dump(manifest) != self._manifest_text
        done = tuple(grid.name(i) for i in range(grid.count) if grid.name(i) in kept)
        return _State(manifest, folder_grid, pending, inflight, drop, changed, done)

    def apply(self, state: _State) -> None:
        """Write the manifest first, then drop partitions (so a kill here is recoverable)."""
        self.write_manifest(state.manifest)
        for name in state.drop:
            shutil.rmtree(self.out / name)

    def write_manifest(self, doc: Mapping[str, Any]) -> None:
        """Replace the manifest atomically (temp file, fsync, rename), when it changed."""
        text = _dump(doc)
        if text == self._manifest_text:
            return
        tmp = self.tmp / f"manifest-{uuid.uuid4().hex}.json"
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, self.out / MANIFEST)
        _fsync_dir(self.out)
        self._manifest_text = text

    def commit(self, name: str, written: Path) -> None:
        """Move a finished file into its partition folder; the rename is atomic."""
        with open(written, "rb") as fh:
            os.fsync(fh.fileno())
        final = self.out / name
        final.mkdir(exist_ok=True)
        os.replace(written, final / PART)
        _fsync_dir(final)
        _fsync_dir(self.out)


def _entry(name: str, t: dt.datetime, rows: int) -> dict[str, Any]:
    return {"as_of": _iso(t), "path": f"{name}/{PART}", "rows": int(rows)}


def _dump(doc: Mapping[str, Any]) -> str:
    return json.dumps(doc, indent=2, sort_keys=True, ensure_ascii=False) + "\n"


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


# --- the queries --------------------------------------------------------------------------------


class _Session:
    """One DuckDB connection: the population, the checks, the spine and the partition writes."""

    def __init__(
        self,
        target: _Target,
        inputs: dict[str, object],
        grid: _Grid,
        folder: _Folder,
        memory_limit: str | None,
        temp_dir: str | os.PathLike[str] | None,
        threads: int | None,
    ) -> None:

        self.target = target
        self.inputs = inputs
        self.grid = grid
        self.folder = folder
        self.memory_limit = memory_limit
        self.temp_dir = temp_dir
        self.threads = threads
        from .engines.duckdb import connect

        self.con: duckdb.DuckDBPyConnection = connect()
        self.population: dict[str, Any] | None = None
        self._population_table: str | None = None
        self._engine: DuckDBEngine | None = None
        self._plan: Any = None
        self._key_types: dict[str, pa.DataType] = {}

    def __enter__(self) -> _Session:
        return self

    def __exit__(self, *exc: object) -> None:
        self.con.close()

    # -- setup -------------------------------------------------------------------------------

    def load_population(self, population: object) -> None:
        """Register the population's distinct keys; null keys are an error; digest them."""
        if population is None:
            return
        from .engines.duckdb import DuckDBEngine
        from .engines.sql import quote_ident as q

        obj = _as_arrow(population)
        if isinstance(obj, str):
            probe = DuckDBEngine()
            schema = probe.bind({"population": obj})["population"]
            obj = probe.con.sql('SELECT * FROM "aj_src_0"').to_arrow_table()
            probe.con.close()
        import pyarrow as pa

        if not isinstance(obj, pa.Table):
            msg = (
                f"population is a {type(population).__name__}; pass a pandas, polars or pyarrow "
                "frame, a DuckDB relation, or a Parquet/CSV path"
            )
            raise InputError(msg)
        schema = obj.schema
        for key in self.target.keys:
            if key not in schema.names:
                what = "population"
                raise ColumnNotFoundError.missing(
                    what, key, "entity key", schema.names, "Add the key columns."
                )
        self.con.register("__aj_bf_population_src", obj.select(list(self.target.keys)))
        keys = ", ".join(q(k) for k in self.target.keys)
        nulls = " OR ".join(f"{q(k)} IS NULL" for k in self.target.keys)
        bad = self.con.execute(
            f'SELECT count(*) FROM "__aj_bf_population_src" WHERE {nulls}'
        ).fetchall()[0][0]
        if bad:
            msg = (
                f"population has {bad} row(s) with a null key in {list(self.target.keys)}; "
                "drop them"
            )
            raise InputError(msg, table="population", value=bad)
        self.con.execute(
            f'CREATE TEMP TABLE "__aj_bf_population" AS SELECT DISTINCT {keys} '
            f'FROM "__aj_bf_population_src" ORDER BY {keys}'
        )
        self.con.unregister("__aj_bf_population_src")
        text = " || chr(31) || ".join(f"CAST({q(k)} AS VARCHAR)" for k in self.target.keys)
        count, digest = self.con.execute(
            f'SELECT count(*), bit_xor(md5_number({text})) FROM "__aj_bf_population"'
        ).fetchall()[0]
        self.population = {"keys": int(count), "digest": f"{int(digest or 0):032x}"}
        self._population_table = "__aj_bf_population"
        for f in obj.schema:
            if f.name in self.target.keys:
                self._key_types[f.name] = f.type

    def fingerprint(self) -> str:
        """A hash of the canonical spec and the population: equal means same snapshots."""
        doc = {
            "format": FORMAT,
            "spec": self.target.spec.to_document(with_paths=False),
            "population": self.population,
        }
        text = json.dumps(doc, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]

    def check_inputs(self) -> None:
        """build()'s own checks (names, columns, key and time types, null times), up front."""
        import pyarrow as pa

        from .engines.duckdb import DuckDBEngine
        from .inputs import check_inputs
        from .plan import make_plan

        spec = self.target.spec
        if not self._key_types:
            probe = DuckDBEngine()
            schemas = probe.bind(self.inputs)
            probe.con.close()
            for feat in spec.features:
                for lcol, tcol in zip(*spec.join_keys(feat), strict=True):
                    if lcol not in self._key_types:
                        typ = schemas[feat.table.name].field(tcol).type
                        if pa.types.is_dictionary(typ):
                            typ = typ.value_type
                        self._key_types[lcol] = typ
        placeholder = pa.table(
            {k: pa.array([], self._key_types[k]) for k in self.target.keys}
            | {AS_OF: pa.array([], self._time_type())}
        )
        engine = DuckDBEngine(
            connection=self.con,
            memory_limit=self.memory_limit,
            temp_dir=self.temp_dir or self.folder.tmp / "duckdb",
            threads=self.threads,
        )
        schemas = engine.bind({self.target.label: placeholder, **self.inputs})
        checked = check_inputs(spec, schemas)
        plan = make_plan(
            spec,
            checked.times,
            checked.label_columns,
            aware=checked.aware,
            integer_columns=checked.integer_columns,
        )
        engine.check_null_times(plan)
        self._engine, self._plan = engine, plan

    def _time_type(self) -> pa.DataType:
        import pyarrow as pa

        return pa.timestamp("us", tz="UTC") if self.grid.aware else pa.timestamp("us")

    def _register_grid(self) -> None:
        import pyarrow as pa

        times = [self.grid.at(i) for i in range(self.grid.count)]
        table = pa.table(
            {
                "i": pa.array(range(self.grid.count), pa.int64()),
                AS_OF: pa.array(times, self._time_type()),
            }
        )
        self.con.register("__aj_bf_grid_src", table)
        self.con.execute('CREATE TEMP TABLE "__aj_bf_grid" AS SELECT * FROM "__aj_bf_grid_src"')
        self.con.unregister("__aj_bf_grid_src")

    def _entries(self) -> str:
        """A table of (keys, first grid index at which the key has a visible row)."""
        from .engines.duckdb import DuckDBRenderer
        from .engines.sql import quote_ident as q

        keys = ", ".join(q(k) for k in self.target.keys)
        if self._population_table is not None:
            self.con.execute(
                f'CREATE TEMP TABLE "__aj_bf_entry" AS SELECT {keys}, 0 AS "__aj_bf_first" '
                f'FROM "{self._population_table}"'
            )
            return "__aj_bf_entry"
        assert self._engine is not None and self._plan is not None
        renderer = DuckDBRenderer(self._plan, self._engine.sources)
        clock = renderer.time_expr(self._plan.labels.time, alias="gg")
        parts: list[str] = []
        seen: set[tuple[str, tuple[str, ...]]] = set()
        for lookup in self._plan.lookups:
            if (lookup.table, lookup.table_keys) in seen:
                continue
            seen.add((lookup.table, lookup.table_keys))
            rows = renderer.rows_cte(lookup, [])  # build()'s own row filter and known time
            inner = ", ".join(f'"__aj_k{i}"' for i in range(len(lookup.table_keys)))
            named = ", ".join(
                f'f."__aj_k{i}" AS {q(col)}' for i, col in enumerate(lookup.label_keys)
            )
            op = ">=" if lookup.inclusive else ">"  # visible iff known < T (<= when inclusive)
            parts.append(
                f'SELECT {named}, g.i AS "__aj_bf_first"\n'
                f'    FROM (SELECT {inner}, min("__aj_kt") AS "__aj_kt" FROM {rows} '
                f"GROUP BY {inner}) AS f\n"
                f'    ASOF JOIN (SELECT gg.i, {clock} AS t FROM "__aj_bf_grid" AS gg) AS g\n'
                f'    ON g.t {op} f."__aj_kt"'
            )
        with_sql = ",\n".join(f"{q(n)} AS (\n    {b}\n)" for n, b in renderer.ctes)
        union = "\nUNION ALL BY NAME\n".join(parts)
        self.con.execute(
            f'CREATE TEMP TABLE "__aj_bf_entry" AS WITH {with_sql}\n'
            f'SELECT {keys}, min("__aj_bf_first") AS "__aj_bf_first" FROM ({union}) '
            f"GROUP BY {keys}",
            dict(renderer.params.values),
        )
        return "__aj_bf_entry"

    # -- the run -----------------------------------------------------------------------------

    def run(self, state: _State, chunk: int | None, show: bool) -> Iterator[tuple[str, int]]:
        """Build chunk after chunk of snapshot times; write, rename and record each partition."""
        from tqdm.auto import tqdm

        from .build import build
        from .engines.sql import literal
        from .engines.sql import quote_ident as q

        self.grid = state.grid
        self._register_grid()
        entries = self._entries()
        keys = ", ".join(q(k) for k in self.target.keys)
        e_keys = ", ".join(f"e.{q(k)}" for k in self.target.keys)
        if chunk is None:
            last = max(state.pending)
            size = self.con.execute(
                f'SELECT count(*) FROM "{entries}" WHERE "__aj_bf_first" <= $last', {"last": last}
            ).fetchall()[0][0]
            chunk = max(1, CHUNK_ROWS // max(int(size), 1))
        # The chunk a killed run was writing is rebuilt with the same snapshot times, so its
        # remaining partitions come out bit for bit as they would have (a window aggregate's
        # floating-point rounding can depend on which other rows share the query).
        pending = set(state.pending)
        chunks = [state.inflight] if state.inflight else []
        rest = [i for i in state.pending if i not in set(state.inflight)]
        chunks += [rest[c : c + chunk] for c in range(0, len(rest), chunk)]
        pause = float(os.environ.get(SLEEP_ENV, "0") or 0)
        manifest = state.manifest
        meta = {
            "asof_join.fingerprint": manifest["fingerprint"],
            "asof_join.spec": json.dumps(
                self.target.spec.to_document(with_paths=False), ensure_ascii=False
            ),
            "asof_join.version": __version__,
        }
        tmp = self.folder.tmp
        temp_dir = self.temp_dir or tmp / "duckdb"
        bar = tqdm(total=len(pending), unit="partition", desc="backfill", disable=not show)
        try:
            for ids in chunks:
                todo = [i for i in ids if i in pending]
                if not todo:
                    continue
                manifest["inflight"] = {"partitions": [self.grid.name(i) for i in ids]}
                self.folder.write_manifest(manifest)
                spine = tmp / f"spine-{ids[0]}.partial"
                self.con.execute(
                    f"COPY (SELECT {e_keys}, g.{q(AS_OF)} FROM {q(entries)} AS e "
                    f'JOIN "__aj_bf_grid" AS g ON g.i >= e."__aj_bf_first" '
                    f"WHERE list_contains($ids, g.i) ORDER BY g.i, {e_keys}) "
                    f"TO {literal(str(spine))} (FORMAT parquet)",
                    {"ids": ids},
                )
                # a fresh connection per chunk: bound names are registered anew each build
                from .engines.duckdb import connect

                con = connect()
                train = build(
                    self.target.spec,
                    data={**self.inputs, self.target.label: str(spine)},
                    memory_limit=self.memory_limit,
                    temp_dir=temp_dir,
                    threads=self.threads,
                    connection=con,
                )
                built = tmp / f"chunk-{ids[0]}.partial"
                train.write_parquet(built)
                del train
                con.close()
                spine.unlink()
                for i in todo:
                    name = self.grid.name(i)
                    t = self.grid.at(i)
                    written = tmp / f"part-{i}.partial"
                    kv = ", ".join(
                        f"{literal(k)}: {literal(v)}"
                        for k, v in {**meta, "asof_join.as_of": _iso(t)}.items()
                    )
                    rows = self.con.execute(
                        f"COPY (SELECT * EXCLUDE ({q(AS_OF)}) FROM read_parquet("
                        f"{literal(str(built))}) WHERE epoch_us({q(AS_OF)}) = $us "
                        f"ORDER BY {keys}) TO {literal(str(written))} "
                        f"(FORMAT parquet, KV_METADATA {{{kv}}})",
                        {"us": _micros(t)},
                    ).fetchall()[0][0]
                    if pause:
                        time.sleep(pause)
                    self.folder.commit(name, written)
                    if pause:
                        time.sleep(pause)
                    manifest["partitions"][name] = _entry(name, t, rows)
                    manifest["partitions"] = dict(sorted(manifest["partitions"].items()))
                    if i == todo[-1]:
                        manifest["inflight"] = None
                    self.folder.write_manifest(manifest)
                    bar.update(1)
                    yield name, int(rows)
                built.unlink()
        finally:
            bar.close()
