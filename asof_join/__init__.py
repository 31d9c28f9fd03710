"""asof_join: point-in-time correct training sets from declared entities and event tables."""

from __future__ import annotations

__version__ = "0.1.0"

from .audit import AuditReport, Finding, Rule, Severity, audit
from .backfill import BackfillResult, backfill
from .build import TrainingSet, build
from .errors import (
    AsofJoinError,
    ColumnNotFoundError,
    InputError,
    KeyTypeMismatchError,
    NullTimeError,
    SpecError,
    TimeTypeError,
    UnknownTableError,
    UnreadableInputError,
    UnsupportedByEngineError,
)
from .ranking import sample_negatives
from .spec import Entity, EventTable, Latest, Trailing, TrainingSetSpec
from .spec_file import load_spec, spec_json_schema
from .splits import split_by_time

__all__ = [
    "AsofJoinError",
    "AuditReport",
    "BackfillResult",
    "ColumnNotFoundError",
    "Entity",
    "EventTable",
    "Finding",
    "InputError",
    "KeyTypeMismatchError",
    "Latest",
    "NullTimeError",
    "Rule",
    "Severity",
    "SpecError",
    "TimeTypeError",
    "Trailing",
    "TrainingSet",
    "TrainingSetSpec",
    "UnknownTableError",
    "UnreadableInputError",
    "UnsupportedByEngineError",
    "__version__",
    "audit",
    "backfill",
    "build",
    "load_spec",
    "sample_negatives",
    "spec_json_schema",
    "split_by_time",
]
