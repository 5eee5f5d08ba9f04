"""A tracer set as a model file keeps it: the ``TRACERS`` extension of both kinds of model file.

Written and read by :mod:`dustkit.io` (the binned model) and :mod:`dustkit.density.files`
(the density model) alike, so that a loaded model's tracers are the ones it was built from:
their reddening as measured (``EXCESS`` in the colour ``EXCKIND``, source temperatures), not
only the A_V it gave under one law, so that a change of law or R_V after loading
(``with_law``, the explorer) converts them again instead of keeping A_V as it was.
"""

import json
from dataclasses import replace

import numpy as np

__all__ = ["FLOATS", "tracer_columns", "tracer_set", "tracers_hdu", "tracers_from_hdu"]

#: Per-tracer float columns a model file keeps (those a tracer set has).
FLOATS = ("l", "b", "distance", "distance_err", "av", "av_err", "excess", "excess_err", "temperature",
          "av_distance_corr")
_UNITS = {"l": "deg", "b": "deg", "distance": "pc", "distance_err": "pc", "temperature": "K", "av_distance_corr": ""}


def tracer_columns(tracers):
    """The tracers' arrays (name -> ndarray) and facts (law, rv, excess_kind, meta) a model file keeps."""
    arrays = {k: np.asarray(getattr(tracers, k)) for k in ("l", "b", "distance", "distance_err", "av", "av_err")}
    if getattr(tracers, "__dict__", {}).get("names_of", True) is not None:  # names given (not made from rows)
        arrays["name"] = np.asarray(tracers.name)
    for k in ("excess", "excess_err", "temperature", "av_distance_corr"):
        v = getattr(tracers, k, None)
        if v is not None and not (k == "av_distance_corr" and not np.any(v)):
            arrays[k] = np.asarray(v, float)
    info = {"law": tracers.law, "rv": float(tracers.rv), "excess_kind": getattr(tracers, "excess_kind", "A_V"),
            "meta": dict(getattr(tracers, "meta", {}) or {})}
    return arrays, info


def tracer_set(tracers, info):
    """The tracers of a model's state: a TracerSet as it is (read from a file), or one made from the arrays."""
    from .sets import TracerSet

    if isinstance(tracers, TracerSet):
        return tracers
    return TracerSet.from_arrays(tracers["l"], tracers["b"], tracers["distance"], tracers["distance_err"],
                                 tracers["av"], tracers["av_err"], name=tracers.get("name"), law=info["law"],
                                 rv=info["rv"])


def tracers_hdu(arrays, info, row=None, distance_kind="distance"):
    """The ``TRACERS`` extension from :func:`tracer_columns` output (``row``: input row numbers, if not 0..n-1)."""
    from astropy.io import fits

    tmeta = info.get("meta") or {}
    cols = []
    if "name" in arrays:  # names as given; without them the names are "row <ROW>", made again on reading
        names = np.char.encode(np.asarray(arrays["name"]).astype(str), "utf-8")  # FITS strings are bytes
        cols.append(fits.Column(name="NAME", format=f"{max(1, names.dtype.itemsize)}A", array=names))
    # A_V given as such: EXCESS and EXCESS_ERR would repeat AV and AV_ERR bit for bit (16 bytes a tracer,
    # a fifth of a large file); they are then left out and made again on reading (EXCSAME)
    same = (str(info.get("excess_kind", "A_V")) == "A_V" and all(k in arrays for k in ("excess", "excess_err"))
            and np.array_equal(arrays["excess"], arrays["av"]) and np.array_equal(arrays["excess_err"], arrays["av_err"]))
    for k in FLOATS:
        if k in arrays and not (same and k in ("excess", "excess_err")):
            cols.append(fits.Column(name=k.upper(), format="D", unit=_UNITS.get(k, "mag") or None,
                                    array=np.asarray(arrays[k], float)))
    if row is not None and not _is_sequence(row):  # rows 0, 1, ..., n-1 (every row kept): made again on reading
        cols.append(fits.Column(name="ROW", format="K", array=np.asarray(row, np.int64)))
    hdu = fits.BinTableHDU.from_columns(cols, name="TRACERS")
    h = hdu.header
    h["LAW"] = str(info["law"])
    h["RV"] = float(info["rv"])
    h["EXCKIND"] = (str(info.get("excess_kind", "A_V")), "what the EXCESS column is")
    if same:
        h["EXCSAME"] = (True, "EXCESS, EXCESS_ERR equal AV, AV_ERR: not stored")
    h["DISTKIND"] = (str(distance_kind), "how distances were given")
    h["CATSHA"] = str(tmeta.get("sha256", ""))
    h["CATSHAOF"] = str(tmeta.get("sha256_of", ""))
    h["TRMETA"] = json.dumps(_jsonable(tmeta), ensure_ascii=True)  # tracer-set metadata (JSON); long: no comment
    return hdu


def tracers_from_hdu(header, data, law=None, rv=None):
    """The :class:`~dustkit.tracers.TracerSet` of a ``TRACERS`` extension; returns (tracers, arrays read).

    ``law`` and ``rv`` are used where the header has none (density model files written before
    this layout kept them in their state). Rows are validated again, silently (they were
    when the model was built); the caller compares the count.
    """
    import warnings

    from .sets import TracerSet

    names = data.columns.names
    arrays = {k: np.asarray(data[k.upper()], float) for k in FLOATS if k.upper() in names}
    if header.get("EXCSAME", False):  # left out on writing: A_V given as such
        arrays["excess"], arrays["excess_err"] = arrays["av"].copy(), arrays["av_err"].copy()
    if "NAME" in names:
        raw = np.asarray(data["NAME"])
        arrays["name"] = np.char.decode(raw, "utf-8", "replace") if raw.dtype.kind == "S" else raw.astype(str)
    try:
        tmeta = json.loads(header.get("TRMETA", "{}"))
    except ValueError:
        tmeta = {}
    law = str(header.get("LAW", law if law is not None else "ccm89"))
    rv = float(header.get("RV", rv if rv is not None else 3.1))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the tracers were validated when the model was built
        ts = TracerSet.from_arrays(arrays["l"], arrays["b"], arrays["distance"], arrays["distance_err"], arrays["av"],
                                   arrays["av_err"], name=arrays.get("name"), law=law, rv=rv,
                                   av_distance_corr=arrays.get("av_distance_corr"))
    kind = str(header.get("EXCKIND", "A_V"))
    changes = {"meta": tmeta, "excess_kind": kind, "distance_kind": str(header.get("DISTKIND", "distance"))}
    for k in ("excess", "excess_err", "temperature"):
        if k in arrays:
            changes[k] = arrays[k]
    n = arrays["l"].size
    changes["row"] = np.asarray(data["ROW"], np.int64) if "ROW" in names else np.arange(n, dtype=np.int64)
    changes["name"] = ts.name if "name" in arrays else None  # as stored, or made from ROW when asked
    if kind not in ("A_V", "E(B-V)") and kind.startswith("E("):  # the colour, for TracerSet.with_law
        from ..bands import parse_excess_name

        changes["excess_color"] = parse_excess_name(kind, strict=False)
    elif kind == "E(B-V)":
        changes["excess_color"] = ("B", "V")
    if len(ts) != n:
        return ts, arrays
    return replace(ts, **changes), arrays


def _is_sequence(row):
    """True for the row numbers 0, 1, ..., n-1."""
    row = np.asarray(row)
    return row.ndim == 1 and (row.size == 0 or (row[0] == 0 and row[-1] == row.size - 1 and bool(np.all(np.diff(row) == 1))))


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return float(obj)
    if isinstance(obj, (str, int, float, bool)) or obj is None:
        return obj
    return str(obj)
