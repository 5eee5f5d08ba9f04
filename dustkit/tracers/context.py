"""Reading context: the rejected rows (first reason per row) and the notes (warnings) of one read."""

import hashlib
import warnings

import numpy as np
from astropy.table import MaskedColumn, Table

from ..exceptions import AssumptionWarning

__all__ = [
    "empty_rejected",
    "empty_duplicates",
    "row_names",
    "Rejections",
    "Context",
    "emit",
]


def empty_rejected():
    return Table(
        {
            "row": np.zeros(0, dtype=np.int64),
            "name": np.zeros(0, dtype=str),
            "reason": np.zeros(0, dtype=str),
            "column": np.zeros(0, dtype=str),
            "value": np.zeros(0, dtype=str),
        }
    )


def empty_duplicates():
    """The empty table of duplicated input rows (columns of ``TracerSet.duplicates``)."""
    return Table(
        {"group": np.zeros(0, dtype=np.int64), "row": np.zeros(0, dtype=np.int64), "name": np.zeros(0, dtype="U1"),
         "kind": np.zeros(0, dtype="U5"), "merged_into": np.zeros(0, dtype=np.int64)}
    )


def row_names(rows):
    """``"row <i>"`` for input row numbers, in as narrow a string type as the numbers allow."""
    rows = np.asarray(rows, dtype=np.int64)
    if rows.size == 0:
        return np.zeros(0, dtype="U4")
    return np.char.add("row ", rows.astype(f"U{len(str(int(rows.max())))}"))


class Rejections:
    """First reason per rejected row; the table is built by looping over reasons only."""

    def __init__(self, n):
        self.code = np.full(n, -1, dtype=np.int32)
        self.reasons = []  # (reason, column, raw values)

    def add(self, bad, reason, column, raw):
        bad = np.asarray(bad, dtype=bool)
        new = bad & (self.code < 0)
        if new.any():
            self.code[new] = len(self.reasons)
            self.reasons.append((reason, column, raw))
        return bad

    def counts(self):
        return np.bincount(self.code[self.code >= 0], minlength=len(self.reasons))

    def reason_text(self):
        counts = self.counts()
        order = np.argsort(-counts, kind="stable")
        return "; ".join(f"{counts[k]} {self.reasons[k][0]}" for k in order if counts[k])

    def table(self, names):
        if not self.reasons:
            return empty_rejected()
        parts = []
        for k, (reason, column, raw) in enumerate(self.reasons):
            rows = np.flatnonzero(self.code == k)
            parts.append((rows, reason, column, _value_strings(raw, rows)))
        rows = np.concatenate([p[0] for p in parts])
        order = np.argsort(rows, kind="stable")
        t = Table()
        t["row"] = rows[order].astype(np.int64)
        t["name"] = (row_names(rows) if names is None else np.asarray(names)[rows])[order].astype(str)
        t["reason"] = np.concatenate([np.full(p[0].size, p[1]) for p in parts])[order].astype(str)
        t["column"] = np.concatenate([np.full(p[0].size, p[2]) for p in parts])[order].astype(str)
        t["value"] = np.concatenate([p[3] for p in parts])[order].astype(str)
        return t


def _value_strings(raw, rows):
    if raw is None:
        return np.full(rows.size, "")
    data = raw
    mask = None
    if isinstance(raw, MaskedColumn) or np.ma.isMaskedArray(raw):
        mask = np.ma.getmaskarray(raw)[rows]
        data = np.ma.getdata(raw)
    vals = np.asarray(getattr(data, "value", data))[rows]
    if vals.dtype.kind == "S":
        vals = np.char.decode(vals, "utf-8", "replace")
    if vals.dtype.kind == "f":
        out = np.char.mod("%.10g", vals)
    else:
        out = vals.astype(str)
    if mask is not None:
        out = np.where(mask, "(empty)", out)
    return out


class Context:
    def __init__(self, table, desc):
        self.table = table
        self.desc = desc
        self.n = len(table)
        self.rej = Rejections(self.n)
        self.notes = []  # (warning class, message)
        self.assumptions = []
        self.used = {}
        self.quiet_default_errors = False
        self.modulus_kind = None  # 'true' | 'apparent' for a modulus column whose name does not say
        self.temperature = None  # per-row source temperatures of a colour-excess conversion (K)
        self.rows_are = "tracers"  # what the rows are, in messages: "tracers" or "targets" (read_targets)
        self.sexagesimal_hours = set()  # columns read as sexagesimal hours of right ascension
        self.unit_hint = None  # a column's values that look like another unit than read (said if nothing is left)

    def note(self, cls, msg, assumption=True):
        self.notes.append((cls, msg))
        if assumption and cls is AssumptionWarning:
            self.assumptions.append(msg)

    def meta(self, file_sha, arrays):
        counts = self.rej.counts()
        if file_sha is None:
            sha = hashlib.sha256()
            for a in arrays:  # hashed in place: no byte copies of large arrays
                sha.update(np.ascontiguousarray(a).reshape(-1).view(np.uint8))
            digest, of = sha.hexdigest(), "arrays"
        else:
            digest, of = file_sha, "file"
        return {
            "source": self.desc,
            "n_input": self.n,
            "columns": dict(self.used),
            "assumptions": list(self.assumptions),
            "rejected_by_reason": {r[0]: int(c) for r, c in zip(self.rej.reasons, counts)},
            "sha256": digest,
            "sha256_of": of,
        }


def emit(notes):
    for cls, msg in notes:
        warnings.warn(msg, cls, stacklevel=3)
