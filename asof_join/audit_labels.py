"""Leakage audit, label rules: ``label_proxy`` and ``split_overlap``.

A feature that separates a binary label almost perfectly, and time splits whose rows overlap
(with the gap). Mixed into the auditor in ``audit.py``, which provides the connection, the
frame's types and ``_add``.
"""

from __future__ import annotations

import datetime as dt
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa

from .audit_report import PROXY_AUC, PROXY_EQUAL_SHARE, PROXY_MIN_CLASS_ROWS, Rule
from .audit_sql import _AUD, _NUMERIC, _POS, _family, _micros_to_py, _params, _rows
from .durations import format_duration
from .engines.sql import Params, quote_ident

if TYPE_CHECKING:
    from .spec import TrainingSetSpec

q = quote_ident


class LabelChecks:
    """The label rules; needs the auditor's frame, label and split settings and helpers."""

    spec: TrainingSetSpec
    label: str | None
    split: str | None
    split_names: tuple[str, ...]
    gap_us: int
    max_examples: int
    notes: list[str]
    types: dict[str, str]
    _auc: Any

    def _check_label_proxy(self) -> None:
        if self.label is None:
            return
        lab = q(self.label)
        values = [
            r[0]
            for r in self._scalar_rows(
                f"SELECT DISTINCT {lab} FROM {q(_AUD)} WHERE {lab} IS NOT NULL LIMIT 3", Params()
            )
        ]
        if len(values) != 2:
            self.notes.append(
                f"label_proxy skipped: label {self.label!r} has "
                f"{'more than 2' if len(values) > 2 else len(values)} distinct values; the rule "
                "needs a binary label"
            )
            return
        try:
            positive = sorted(values)[1]
        except TypeError:
            positive = sorted(values, key=str)[1]
        label_type = self.types[self.label]
        for out in self.outputs:
            f = q(out.name)
            f_type = self.types[out.name]
            eq = self._eq(f, lab, f_type, label_type)
            p = _params(pos=positive)
            row = self._scalar_rows(
                f"SELECT count(*), count(*) FILTER (WHERE {eq}), "
                f"count(*) FILTER (WHERE {f} IS NOT NULL AND {lab} = $pos), "
                f"count(*) FILTER (WHERE {f} IS NOT NULL AND {lab} <> $pos) "
                f"FROM {q(_AUD)} WHERE {lab} IS NOT NULL",
                p,
            )[0]
            labelled, equal, n_pos, n_neg = (int(x) for x in row)
            if min(n_pos, n_neg) < PROXY_MIN_CLASS_ROWS:
                continue
            measure: dict[str, Any] | None = None
            if labelled and equal / labelled >= PROXY_EQUAL_SHARE:
                measure = {
                    "measure": "equal_share",
                    "value": equal / labelled,
                    "threshold": PROXY_EQUAL_SHARE,
                }
                text = (
                    f"equals the label {self.label!r} on {equal / labelled:.2%} of {labelled:,} "
                    f"labelled rows (threshold {PROXY_EQUAL_SHARE:.0%})"
                )
                measured = labelled
            elif _family(f_type) in _NUMERIC and (roc_auc_score := self._roc_auc()) is not None:
                xy = self._fetch(
                    f"SELECT CAST({f} AS DOUBLE) AS x, {lab} = $pos AS y FROM {q(_AUD)} "
                    f"WHERE {lab} IS NOT NULL AND {f} IS NOT NULL "
                    f"AND NOT isnan(CAST({f} AS DOUBLE))",
                    p,
                )
                y = xy.column("y").to_numpy(zero_copy_only=False).astype(bool)
                if min(int(y.sum()), int((~y).sum())) < PROXY_MIN_CLASS_ROWS:
                    continue
                x = xy.column("x").to_numpy(zero_copy_only=False)
                auc = float(roc_auc_score(y, x))
                if 1 - PROXY_AUC < auc < PROXY_AUC:
                    continue
                measure = {"measure": "roc_auc", "value": auc, "threshold": PROXY_AUC}
                text = (
                    f"separates the label {self.label!r} almost perfectly: ROC AUC {auc:.4f} "
                    f"over {len(y):,} rows (threshold >= {PROXY_AUC} or <= "
                    f"{1 - PROXY_AUC:.2f})"
                )
                measured = len(y)
            if measure is None:
                continue
            sample = self._fetch(
                f"SELECT {q(_POS)} AS pos, {lab} AS label, {f} AS value FROM {q(_AUD)} "
                f"WHERE {lab} IS NOT NULL AND {f} IS NOT NULL ORDER BY {q(_POS)} "
                f"LIMIT {int(self.max_examples)}",
                Params(),
            ).to_pylist()
            examples = [
                {"position": r["pos"], "label": r["label"], "value": r["value"]} for r in sample
            ]
            self._add(
                Rule.LABEL_PROXY,
                out,
                np.empty(0, dtype=np.int64),
                f"{out.name!r} {text}; a single feature this predictive is usually derived from "
                "the label",
                examples,
                rows=measured,
                details=measure,
            )

    def _roc_auc(self) -> Any:
        """sklearn's roc_auc_score, imported on first use; None (and a note) when missing."""
        if self._auc is None:
            try:
                from sklearn.metrics import roc_auc_score
            except ImportError:
                self._auc = False
                self.notes.append(
                    "label_proxy: scikit-learn is not installed, so the ROC AUC measure was "
                    "skipped (pip install scikit-learn); the equality measure ran"
                )
            else:
                self._auc = roc_auc_score
        return self._auc or None

    # -- splits ----------------------------------------------------------------------------

    def _check_splits(self) -> None:
        if self.split is None:
            return
        from .splits import GAP

        p = Params()
        t = self._t(p)
        sc = f"CAST({q(self.split)} AS VARCHAR)"
        gap_name = p.add(GAP)
        stats = self._scalar_rows(
            f"SELECT {sc} AS name, min({t}), max({t}) FROM {q(_AUD)} "
            f"WHERE {q(self.split)} IS NOT NULL AND {sc} <> {gap_name} "
            f"AND {q(self.spec.labels.time)} IS NOT NULL GROUP BY name",
            p,
        )
        if len(stats) < 2:
            return
        first = {name: lo for name, lo, _ in stats}
        last = {name: hi for name, _, hi in stats}
        listed = [n for n in self.split_names if n in first]
        others = sorted((n for n in first if n not in self.split_names), key=lambda n: first[n])
        if others:
            self.notes.append(
                f"split values {others} are not in split_names; ordered by their first label time"
            )
        order = listed + others
        gap_text = format_duration(dt.timedelta(microseconds=self.gap_us))
        for a_index, earlier in enumerate(order):
            for later in order[a_index + 1 :]:
                bound = last[earlier] + self.gap_us
                lp = Params()
                lt = self._t(lp)
                name_param = lp.add(later)
                bound_param = lp.add(int(bound))
                found = self._fetch(
                    f"SELECT {q(_POS)} AS pos FROM {q(_AUD)} WHERE {sc} = {name_param} "
                    f"AND {lt} <= CAST({bound_param} AS BIGINT) ORDER BY pos",
                    lp,
                )
                if found.num_rows == 0:
                    continue
                pos = found.column("pos").to_numpy()
                end = _micros_to_py(pa.array([last[earlier]], type=pa.int64()))[0]
                examples = self._examples(None, pos, {})
                for ex in examples:
                    ex["split"] = later
                    ex["earlier_split"] = earlier
                    ex["earlier_split_end"] = end
                self._add(
                    Rule.SPLIT_OVERLAP,
                    None,
                    pos,
                    f"{_rows(found.num_rows)} of split {later!r}: label time at or before the "
                    f"end of {earlier!r} ({end}) plus the gap {gap_text}",
                    examples,
                    details={"earlier": earlier, "later": later, "gap": gap_text},
                )
