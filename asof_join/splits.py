"""split_by_time: label each row train / gap / valid / gap / test by its time and the cuts."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, TypeVar

import numpy as np

from ._frames import (
    FrameKind,
    check_names,
    column_to_arrow,
    columns_of,
    duration_micros,
    frame_kind,
    instant_micros,
    null_positions,
    null_values_error,
    require_columns,
    time_micros,
)
from .errors import InputError, SpecError

__all__ = ["GAP", "split_by_time"]

#: The split name of rows inside a gap.
GAP = "gap"

FrameT = TypeVar("FrameT")


def split_by_time(
    frame: FrameT,
    *,
    time: str,
    cuts: Sequence[object],
    gap: object = "1d",
    names: Sequence[str] = ("train", "valid", "test"),
    column: str = "split",
    null_times: str = "error",
    timezone: str | None = None,
) -> FrameT:
    """Add a ``split`` column naming each row's split by its time, with a gap after each cut.

    With cuts ``c1 < c2`` and ``names=("train", "valid", "test")``: ``t < c1`` is
    ``"train"``; ``c1 <= t < c1 + gap`` is ``"gap"``; ``c1 + gap <= t < c2`` is ``"valid"``;
    ``c2 <= t < c2 + gap`` is ``"gap"``; ``t >= c2 + gap`` is ``"test"``. The gap follows each
    cut, so a later split starts only after it: drop the ``"gap"`` rows before training so that
    no label of a later split lies within ``gap`` of an earlier split's rows (set ``gap`` to at
    least the longest label horizon, e.g. a 30-day return window). Any number of cuts works;
    ``names`` has one more entry than ``cuts``.

    Times are compared at microsecond precision; a date is its midnight. Timezone-aware times
    are compared as instants: cuts must then be aware too, or ``timezone=`` names the zone
    naive cuts are read in (and, for a naive column, the zone aware cuts are converted to).

    Args:
        frame: a pandas DataFrame, polars DataFrame or pyarrow Table; it is not modified.
        time: the time column (timestamp of any unit, naive or aware, or date).
        cuts: increasing split boundaries: datetimes, dates, or ISO strings.
        gap: the duration after each cut whose rows go to ``"gap"`` ("1d", "36h", "P7D",
            timedelta); ``"0s"`` for none. No cut may fall inside the previous cut's gap.
        names: the split names, one more than ``cuts``; none may be ``"gap"``.
        column: the name of the added column (default ``"split"``); it must not exist yet.
        null_times: ``"error"`` (default: a null time raises NullTimeError with the count and
            first positions) or ``"keep"`` (such rows get a null split).
        timezone: IANA zone used when the column and the cuts differ in being zone-aware.

    Returns:
        A new frame of the same kind, with every row in input order (a pandas index is kept)
        and the string column ``split`` appended.

    Raises:
        SpecError: cuts not increasing or inside a previous gap, wrong number of names, a
            negative gap, or the column name already taken.
        InputError: the frame or its time column is missing or of the wrong type, or holds
            nulls (with ``null_times="error"``).

    Example:
        >>> import pandas as pd
        >>> df = pd.DataFrame({"t": pd.to_datetime(
        ...     ["2024-01-31", "2024-02-01", "2024-02-02", "2024-03-01", "2024-03-02"])})
        >>> split_by_time(df, time="t", cuts=["2024-02-01", "2024-03-01"])["split"].tolist()
        ['train', 'gap', 'valid', 'gap', 'test']
    """
    kind = frame_kind(frame, "split_by_time(frame)")
    what = "frame"
    require_columns(frame, kind, what, {time: "time column"})
    if not isinstance(column, str) or not column:
        msg = f"column= must be a non-empty string, got {column!r}"
        raise SpecError(msg)
    if column in columns_of(frame, kind):
        msg = f"frame already has a column {column!r}; pass column='<other name>' or drop it first"
        raise SpecError(msg)
    if null_times not in ("error", "keep"):
        msg = f"null_times must be 'error' or 'keep', got {null_times!r}"
        raise SpecError(msg)

    if isinstance(cuts, (str, bytes)) or not isinstance(cuts, Sequence):
        msg = f"cuts must be a list of times such as ['2024-06-01', '2024-09-01'], got {cuts!r}"
        raise SpecError(msg)
    if len(cuts) == 0:
        msg = "cuts is empty; give at least one cut time"
        raise SpecError(msg)
    if isinstance(names, (str, bytes)):
        msg = f"names must be a sequence of split names, got the string {names!r}"
        raise SpecError(msg)
    split_names = check_names(list(names), "split names")
    if len(split_names) != len(cuts) + 1:
        default = (
            ("train", "test")
            if len(cuts) == 1
            else tuple(f"split_{i}" for i in range(len(cuts) + 1))
        )
        msg = (
            f"{len(cuts)} cut(s) make {len(cuts) + 1} splits but names has {len(split_names)} "
            f"({tuple(split_names)}); pass names= with {len(cuts) + 1} names, e.g. {default}"
        )
        raise SpecError(msg)
    if GAP in split_names or len(set(split_names)) != len(split_names):
        msg = f"split names must be distinct and not {GAP!r}, got {tuple(split_names)}"
        raise SpecError(msg)
    try:
        gap_us = duration_micros(gap, "gap")
    except InputError as exc:
        raise SpecError(str(exc)) from None

    array = column_to_arrow(frame, kind, time)
    t, aware = time_micros(array, what, time, "time")
    cut_us = np.array(
        [instant_micros(c, f"cut {c!r}", aware=aware, timezone=timezone) for c in cuts],
        dtype=np.int64,
    )
    for i in range(1, len(cut_us)):
        if cut_us[i] <= cut_us[i - 1]:
            msg = f"cuts must be strictly increasing: {cuts[i - 1]!r} then {cuts[i]!r}"
            raise SpecError(msg)
        if cut_us[i] < cut_us[i - 1] + gap_us:
            msg = (
                f"cut {cuts[i]!r} falls inside the gap {gap!r} after cut {cuts[i - 1]!r}, so "
                f"split {split_names[i]!r} would be empty; move the cuts apart or shorten gap"
            )
            raise SpecError(msg)

    nulls = null_positions(array)
    if len(nulls) and null_times == "error":
        null_values_error(
            what, time, "time", nulls, "drop those rows or pass null_times='keep' (null split)"
        )

    split = _assign(t, cut_us, gap_us, split_names)
    if len(nulls):
        split[nulls] = None
    out: FrameT = _with_column(frame, kind, column, split)
    return out


def _assign(t: np.ndarray, cuts: np.ndarray, gap: int, names: list[str]) -> np.ndarray:
    """Split name per time: the number of cuts at or before t picks the split, unless in a gap."""
    after = np.searchsorted(cuts, t, side="right")  # cuts <= t
    last_cut = cuts[np.maximum(after - 1, 0)]
    in_gap = (after > 0) & (t < last_cut + gap)
    labels = np.array([*names, GAP], dtype=object)
    out: np.ndarray = labels[np.where(in_gap, len(names), after)]
    return out


def _with_column(frame: Any, kind: FrameKind, column: str, values: np.ndarray) -> Any:
    """A copy of ``frame`` with a string column appended."""
    if kind is FrameKind.PANDAS:
        return frame.assign(**{column: values})
    if kind is FrameKind.POLARS:
        import polars as pl

        return frame.with_columns(pl.Series(column, values.tolist(), dtype=pl.String))
    import pyarrow as pa

    return frame.append_column(column, pa.array(values.tolist(), type=pa.string()))
