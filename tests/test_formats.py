"""Tests for the file-format registry (dustkit._lib.formats): one suffix table for every reader and writer."""

import warnings
from pathlib import Path

import numpy as np
import pytest
from astropy.table import Table
from matplotlib.figure import Figure

from dustkit import io, plotting
from dustkit._lib import formats
from dustkit.exceptions import CatalogError, FileFormatError, ModelFileError, ParameterError
from dustkit.tracers import SUFFIX_FORMATS, read_tracers

def _catalogue(n=40, seed=0):
    rng = np.random.default_rng(seed)
    return Table({"l": rng.uniform(20, 40, n), "b": rng.uniform(-5, 5, n), "distance": rng.uniform(200, 3000, n),
                  "distance_err": np.full(n, 50.0), "av": rng.uniform(0.1, 2, n), "av_err": np.full(n, 0.1)})


def test_the_error_lists_every_accepted_suffix_and_is_each_old_error():
    with pytest.raises(FileFormatError) as info:
        formats.format_for("table.xlsx", "table")
    msg = str(info.value)
    assert "'.xlsx'" in msg and all(s in msg for s in formats.TABLE_FORMATS)
    # it is the error each reader and writer raised for a bad suffix before the registry
    assert isinstance(info.value, ModelFileError) and isinstance(info.value, ParameterError)
    assert isinstance(info.value, CatalogError)


@pytest.mark.parametrize("suffix", sorted(formats.TABLE_FORMATS))
def test_every_table_writer_accepts_every_table_suffix(tmp_path, suffix):
    t = Table({"x": [1.0, 2.0]})
    path = io.write_table(t, tmp_path / f"t{suffix}")
    fmt = {"csv": "ascii.csv", "ecsv": "ascii.ecsv", "fits": "fits"}[formats.TABLE_FORMATS[suffix]]
    assert list(Table.read(path, format=fmt)["x"]) == [1.0, 2.0]


def test_table_writers_and_the_explorer_offer_the_same_formats():
    from dustkit.ui import explorer  # noqa: F401  (ipywidgets is installed for the tests)

    assert io.EXPORT_FORMATS is formats.TABLE_FORMATS
    assert set(explorer._FORMATS) == set(formats.TABLE_FORMATS.values())


def test_figures_take_the_same_suffixes_in_python_and_on_the_command_line(tmp_path):
    ax = Figure(figsize=(2, 2)).add_subplot()
    ax.plot([0, 1], [0, 1])
    for suffix in formats.FIGURE_FORMATS:
        assert plotting.save_figure(ax.figure, tmp_path / f"f{suffix}", dpi=40).stat().st_size > 0
    with pytest.raises(FileFormatError, match=r"\.eps, \.pdf, \.png, \.svg"):
        plotting.save_figure(ax.figure, tmp_path / "f.jpg")
    # the command line refuses the same suffix with the same list (it accepted .jpg before)
    from dustkit.cli import _save_figure, _UsageError

    with pytest.raises(_UsageError, match=r"\.eps, \.pdf, \.png, \.svg"):
        _save_figure(ax.figure, tmp_path / "f.jpg", False)
    assert not (tmp_path / "f.jpg").exists()


def test_catalogue_readers_and_chunked_builds_accept_the_same_parquet_suffixes(tmp_path):
    # '.parq' was accepted by the chunked build only; now by read_tracers too (one table)
    pytest.importorskip("pyarrow")
    for suffix in (s for s, f in formats.CHUNKED_FORMATS.items() if f == "parquet"):
        path = tmp_path / f"cat{suffix}"
        _catalogue().to_pandas().to_parquet(path)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ts = read_tracers(path)
        assert len(ts) == 40 and suffix in SUFFIX_FORMATS
        assert formats.format_for(path, "chunked") == "parquet"
    assert set(formats.CHUNKED_FORMATS) <= set(SUFFIX_FORMATS)
    with pytest.raises(FileFormatError, match=r"\.parquet"):
        formats.format_for(tmp_path / "cat.xlsx", "chunked")


def test_atomic_write_leaves_the_old_file_when_the_writer_fails(tmp_path):
    path = tmp_path / "out.txt"
    path.write_text("old")

    def broken(tmp):
        Path(tmp).write_text("half")
        raise ValueError("disk full")

    with pytest.raises(ModelFileError, match="existing file was left unchanged"):
        formats.atomic_write(path, broken, overwrite=True)
    assert path.read_text() == "old" and sorted(p.name for p in tmp_path.iterdir()) == ["out.txt"]
