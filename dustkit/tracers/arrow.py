"""Parquet read with pyarrow into an astropy Table, shared by the in-memory reader and the chunked reads.

One conversion for both paths, so that a catalogue gives the same rows, units and rejections
whether it is read whole (:func:`dustkit.tracers.read_tracers`) or in chunks
(:mod:`dustkit.tracers.chunks`): numbers without nulls go over without a copy; a column with
null cells becomes a ``MaskedColumn`` (its nulls masked, read as missing values, in text columns
as empty names); text columns become numpy strings; units come from the metadata astropy writes
(``table_meta_yaml``). Files that need astropy's own reader (mixin columns such as Time or
SkyCoord serialised by astropy, nested or dictionary columns) are left to ``Table.read``
(:func:`plain_parquet` says which).
"""

import numpy as np
from astropy import units as u

__all__ = ["plain_parquet", "read_parquet", "arrow_to_table"]


def _plain_type(t):
    import pyarrow as pa

    return (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t)
            or pa.types.is_string(t) or pa.types.is_large_string(t))


def plain_parquet(schema):
    """True when every column of the Parquet ``schema`` (a pyarrow schema) is a plain number, boolean or
    text column and astropy serialised no mixin column into it: what :func:`arrow_to_table` converts
    exactly as astropy's reader would, apart from null cells (masked here)."""
    yaml = (schema.metadata or {}).get(b"table_meta_yaml", b"")
    if b"__serialized_columns__" in yaml:
        return False
    return all(_plain_type(field.type) for field in schema)


def read_parquet(path, columns=None):
    """A Parquet file (its ``columns``, default all) as an astropy Table (see the module docstring).

    ``pyarrow.parquet.ParquetFile.read``, not ``pyarrow.parquet.read_table``: the latter imports
    pyarrow's dataset layer and pandas (0.2 s) for a plain file."""
    import pyarrow.parquet as pq

    pf = pq.ParquetFile(path)
    return arrow_to_table(pf.read(columns=columns), pf.schema_arrow.metadata)


def arrow_to_table(tab, metadata=None):
    """A pyarrow Table as an astropy Table without copying its numbers (read-only arrays); nulls masked."""
    import pyarrow as pa
    from astropy.table import MaskedColumn, Table

    cols = {}
    for name in tab.column_names:
        col = tab.column(name)
        if pa.types.is_string(col.type) or pa.types.is_large_string(col.type):
            vals = np.asarray(col.fill_null("").to_numpy(zero_copy_only=False)).astype(str)
        else:
            vals = _numbers(col)
        if col.null_count:
            cols[name] = MaskedColumn(vals, mask=np.asarray(col.is_null().to_numpy(zero_copy_only=False), bool))
        else:
            cols[name] = vals
    out = Table(cols, names=tab.column_names, copy=False)
    parquet_metadata(out, metadata)
    return out


def _numbers(col):
    """A pyarrow column as a numpy array: integers and floats without nulls as views of its buffers
    (no copy for one chunk); anything else through ``to_numpy`` (nulls as NaN, as astropy reads them).
    ``to_numpy`` imports pandas (0.2 s), which a plain file does not need."""
    import pyarrow as pa

    t = col.type
    if col.null_count or not (pa.types.is_integer(t) or pa.types.is_float32(t) or pa.types.is_float64(t)):
        return col.to_numpy(zero_copy_only=False)
    kind = "f" if pa.types.is_floating(t) else ("i" if pa.types.is_signed_integer(t) else "u")
    dtype = np.dtype(f"{kind}{t.bit_width // 8}")
    parts = [np.frombuffer(c.buffers()[1], dtype=dtype, count=len(c), offset=c.offset * dtype.itemsize)
             for c in col.chunks if len(c)]
    if not parts:
        return np.zeros(0, dtype)
    return parts[0] if len(parts) == 1 else np.concatenate(parts)


def parquet_metadata(table, metadata):
    """Units and table metadata that astropy wrote into a Parquet file's metadata (``table_meta_yaml``),
    set on the table's columns and ``meta``, as ``Table.read`` sets them (the meta carries, e.g., the
    ``EQUINOX`` of the positions)."""
    yaml = (metadata or {}).get(b"table_meta_yaml")
    if not yaml:
        return
    from astropy.table import meta

    try:
        header = meta.get_header_from_yaml(yaml.decode("utf-8").split("\n"))
    except Exception:  # metadata astropy cannot parse: the columns stay bare, as astropy would fail to read them
        return
    for col in header.get("datatype", []):
        name, unit = col.get("name"), col.get("unit")
        if unit and name in table.colnames:
            # as astropy sets it: a unit it cannot parse stays an UnrecognizedUnit, which the
            # reader's lenient unit parsing (dustkit._lib.units.as_unit) reads or reports
            table[name].unit = u.Unit(unit, parse_strict="silent")
    if isinstance(header.get("meta"), dict):
        table.meta.update(header["meta"])
