"""Model files, exported tables and HEALPix slice maps (dustkit.io).

Check values come from the HEALPix FITS convention (Gorski et al. 2005, ApJ 622, 759, and
the keywords healpy writes: PIXTYPE, ORDERING, COORDSYS, NSIDE, INDXSCHM, OBJECT,
FIRSTPIX/LASTPIX), the FITS standard (2880-byte blocks, CHECKSUM/DATASUM), and healpy itself
as the reference reader of HEALPix maps. Models are built from invented fields simulated
with dustkit.simulate.
"""

import ast
import os
import warnings
from pathlib import Path

import healpy as hp
import numpy as np
import pytest
from astropy import units as u
from astropy.io import fits
from astropy.table import QTable, Table

import dustkit
from dustkit import io
from dustkit._errors import ModelFileError, ModelNotFittedError
from dustkit.model import ExtinctionModel
from dustkit.simulate import Cloud, DustField, simulate_tracers
from dustkit.tracers import read_tracers

# an invented field: a layer and two clouds
FIELD = DustField(a0=1.0, h=120.0, z_sun=20.0,
                  clouds=(Cloud(30.0, 1.0, 600.0, 3.0, 30.0, 1.2), Cloud(48.0, -2.0, 1500.0, 2.0, 50.0, 0.8)))


def _tracers(n=300, seed=1):
    t = simulate_tracers(FIELD, n, l_range=(20, 60), b_range=(-8, 8), distance_max=4000, rng=seed,
                         name_prefix="Testfield")
    names = np.array(t["name"], dtype="U40")
    names[3] = "Testfield \u00e9l\u00e8ve"  # non-ASCII names survive the FITS file
    t["name"] = names
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return read_tracers(t)


@pytest.fixture(scope="module")
def model():
    return ExtinctionModel(nside=16, distance_max=4000 * u.pc, distance_step=250 * u.pc, quiet=True).fit(_tracers())


@pytest.fixture(scope="module")
def nested_model():
    return ExtinctionModel(nside=8, distance_max=3000 * u.pc, distance_step=500 * u.pc, ordering="nested",
                           quiet=True, random_state=3).fit(_tracers(200, seed=2))


@pytest.fixture(scope="module")
def saved(model, tmp_path_factory):
    path = tmp_path_factory.mktemp("io") / "model.fits"
    io.save_model(model, path)
    return path


def _queries(n=4000, seed=0):
    rng = np.random.default_rng(seed)
    l = np.concatenate([rng.uniform(15, 65, n // 2), rng.uniform(0, 360, n // 2)])  # survey and elsewhere
    b = np.concatenate([rng.uniform(-10, 10, n // 2), rng.uniform(-90, 90, n // 2)])
    d = rng.uniform(0, 6000, n)  # also beyond the last edge (4 kpc)
    return l * u.deg, b * u.deg, d * u.pc


def _assert_same_answers(m1, m2):
    l, b, d = _queries()
    a1, e1 = m1.av(l, b, d)
    a2, e2 = m2.av(l, b, d)
    assert np.array_equal(a1, a2) and np.array_equal(e1, e2)
    de = 0.1 * d
    a1, e1 = m1.av(l, b, d, distance_err=de)
    a2, e2 = m2.av(l, b, d, distance_err=de)
    assert np.array_equal(a1, a2) and np.array_equal(e1, e2)


# ----------------------------------------------------------------------------- model files

def test_loaded_model_answers_bit_for_bit(model, saved):
    m2 = io.load_model(saved)
    _assert_same_answers(model, m2)
    # everything else a user asks a model for is identical too
    q1 = model.query(40 * u.deg, 1 * u.deg, [500, 2500] * u.pc, bands=("J", "Ks"))
    q2 = m2.query(40 * u.deg, 1 * u.deg, [500, 2500] * u.pc, bands=("J", "Ks"))
    for c in q1.colnames:
        assert np.array_equal(q1[c], q2[c]), c
    p1 = model.profile(30 * u.deg, 1 * u.deg, radius=2 * u.deg)
    p2 = m2.profile(30 * u.deg, 1 * u.deg, radius=2 * u.deg)
    for c in p1.colnames:
        assert np.array_equal(p1[c], p2[c]), c
    t1, t2 = model.to_table(), m2.to_table()
    assert t1.colnames == t2.colnames and t1.meta == t2.meta
    for c in t1.colnames:
        assert np.array_equal(t1[c], t2[c]), c
    for attr in ("av_", "av_err_", "_resid_", "_post_var_", "n_tracers_", "counts_", "differential_"):
        assert np.array_equal(getattr(model, attr), getattr(m2, attr)), attr
    assert m2.layer_.as_dict() == model.layer_.as_dict()
    assert np.array_equal(m2.layer_.pull, model.layer_.pull) and np.array_equal(m2.layer_.covariance,
                                                                                 model.layer_.covariance)
    assert m2.scatter_ == model.scatter_
    assert (m2.law, m2.rv, m2.walk_variance_, m2.sky_passes_) == (model.law, model.rv, model.walk_variance_,
                                                                   model.sky_passes_)
    assert np.array_equal(m2.grid_.distance_edges, model.grid_.distance_edges)
    for c in model.cv_.colnames:
        assert np.array_equal(model.cv_[c], m2.cv_[c])


def test_model_file_from_before_the_layer_pull_still_loads(model, saved, tmp_path):
    # a file written before the layer carried its pull (no LAYER_PULL column): it loads, its
    # answers are the same and its layer reports the stored errors with a zero pull
    old = tmp_path / "old.fits"
    with fits.open(saved) as h:
        st = h["STATE"]
        cols = [c for c in st.columns if c.name != "LAYER_PULL"]
        new_st = fits.BinTableHDU.from_columns(cols, header=st.header, name="STATE")
        fits.HDUList([hdu if hdu.name != "STATE" else new_st for hdu in h]).writeto(old, checksum=True)
    m2 = io.load_model(old)
    _assert_same_answers(model, m2)
    assert m2.layer_.as_dict() == model.layer_.as_dict() and np.array_equal(m2.layer_.pull, np.zeros(3))


def test_loaded_model_keeps_its_tracers_and_catalogue_record(model, saved):
    t1, t2 = model.tracers_, io.load_model(saved).tracers_
    for attr in ("l", "b", "distance", "distance_err", "av", "av_err", "excess", "excess_err", "name", "row"):
        assert np.array_equal(getattr(t1, attr), getattr(t2, attr)), attr
    assert t2.name[3] == "Testfield \u00e9l\u00e8ve"
    assert (t2.excess_kind, t2.law, t2.rv) == ("E(B-V)", "ccm89", 3.1)
    assert t2.meta["sha256"] == t1.meta["sha256"]
    assert t2.meta["assumptions"] == t1.meta["assumptions"]


def test_model_file_follows_the_healpix_fits_convention(model, saved):
    g = model.grid_
    with fits.open(saved, checksum=True) as hdul:
        names = [h.name for h in hdul]
        assert names[:5] == ["PRIMARY", "SKYMODEL", "DISTANCE_EDGES", "STATE", "TRACERS"]
        h = hdul["SKYMODEL"].header
        # HEALPix FITS keywords (Gorski et al. 2005; as healpy writes them)
        assert h["PIXTYPE"] == "HEALPIX"
        assert h["ORDERING"] == "RING"
        assert h["COORDSYS"] == "G"
        assert h["NSIDE"] == 16
        assert h["INDXSCHM"] == "EXPLICIT" and h["OBJECT"] == "PARTIAL"
        pix = np.asarray(hdul["SKYMODEL"].data["PIXEL"])
        # partial sky: fewer rows than the 12 NSIDE^2 = 3072 pixels (Gorski et al. 2005)
        assert 0 < pix.size < 12 * 16**2
        assert np.all(np.diff(pix) > 0) and pix.min() >= 0 and pix.max() < 12 * 16**2
        assert set(model.informed_pixels()) <= set(pix)
        assert hdul["SKYMODEL"].data["AV"].shape == (pix.size, g.n_edges)
        assert hdul["SKYMODEL"].columns["AV"].unit == "mag"
        assert np.array_equal(hdul["DISTANCE_EDGES"].data["DISTANCE"], g.distance_edges)
        # the record a reader of the header needs
        assert h["LAW"] == "ccm89" and h["RV"] == 3.1
        assert h["LAYA0"] == pytest.approx(model.layer_.a0, rel=1e-12)
        assert h["LAYHE"] == pytest.approx(model.layer_.h_err, rel=1e-12)
        assert h["DUSTKIT"] == dustkit.__version__
        assert h["CATSHA"] == model.tracers_.meta["sha256"]
        assert h["NTRACERS"] == len(model.tracers_)
        # every HDU carries FITS checksums (FITS checksum convention)
        assert all("CHECKSUM" in hd.header and "DATASUM" in hd.header for hd in hdul)
    assert os.path.getsize(saved) % 2880 == 0  # FITS files are whole 2880-byte blocks (FITS standard)


def test_full_sky_file_uses_implicit_indexing(model, tmp_path, monkeypatch):
    npix = model.grid_.npix
    monkeypatch.setattr(io, "_stored_pixels", lambda m: np.arange(m.grid_.npix))
    path = io.save_model(model, tmp_path / "full.fits")
    with fits.open(path) as hdul:
        h = hdul["SKYMODEL"].header
        assert (h["INDXSCHM"], h["OBJECT"], h["FIRSTPIX"], h["LASTPIX"]) == ("IMPLICIT", "FULLSKY", 0, npix - 1)
        assert "PIXEL" not in hdul["SKYMODEL"].columns.names
        assert len(hdul["SKYMODEL"].data) == npix
    _assert_same_answers(model, io.load_model(path))


def test_nested_model_round_trip(nested_model, tmp_path):
    path = io.save_model(nested_model, tmp_path / "nested.fits")
    with fits.open(path) as hdul:
        assert hdul["SKYMODEL"].header["ORDERING"] == "NESTED"
    m2 = io.load_model(path)
    assert m2.grid_.ordering == "nested"
    _assert_same_answers(nested_model, m2)


def test_save_refuses_to_overwrite_unless_asked(model, saved, tmp_path):
    path = tmp_path / "m.fits"
    io.save_model(model, path)
    before = path.read_bytes()
    with pytest.raises(ModelFileError, match="already exists.*overwrite=True"):
        io.save_model(model, path)
    assert path.read_bytes() == before
    io.save_model(model, path, overwrite=True)
    assert io.load_model(path).grid_.nside == 16


def test_unfitted_model_cannot_be_saved(tmp_path):
    with pytest.raises(ModelNotFittedError):
        io.save_model(ExtinctionModel(nside=8), tmp_path / "x.fits")
    assert not (tmp_path / "x.fits").exists()


def test_missing_folder_is_a_clear_error(model, tmp_path):
    with pytest.raises(ModelFileError, match="folder .* does not exist"):
        io.save_model(model, tmp_path / "nope" / "m.fits")


def _leftovers(folder, keep):
    return sorted(p.name for p in folder.iterdir() if p.name not in keep)


def test_failed_model_write_leaves_the_old_file_intact(model, tmp_path, monkeypatch):
    path = tmp_path / "m.fits"
    io.save_model(model, path)
    before = path.read_bytes()

    def half_then_fail(hdul, tmp):
        with open(tmp, "wb") as fh:  # partial output, then the disk "fills up"
            fh.write(before[: len(before) // 2])
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(io, "_write_hdul", half_then_fail)
    with pytest.raises(ModelFileError, match="No space left.*left unchanged"):
        io.save_model(model, path, overwrite=True)
    assert path.read_bytes() == before
    assert _leftovers(tmp_path, {"m.fits"}) == []  # no temporary file left behind
    monkeypatch.undo()
    _assert_same_answers(model, io.load_model(path))


def test_failed_export_and_map_writes_leave_old_files_intact(model, tmp_path, monkeypatch):
    table = io.export_table(model, tmp_path / "t.ecsv")
    maps = io.write_slice_maps(model, tmp_path / "maps.fits")
    old_table, old_maps = table.read_bytes(), maps.read_bytes()

    def partial_table(self, target, *args, **kwargs):
        with open(target, "w") as fh:
            fh.write("# %ECSV 1.0\n# ---\n")
        raise KeyboardInterrupt  # interrupted midway

    monkeypatch.setattr(Table, "write", partial_table)
    with pytest.raises(KeyboardInterrupt):
        io.export_table(model, table, overwrite=True)
    assert table.read_bytes() == old_table

    def partial_maps(filename, *args, **kwargs):
        with open(filename, "wb") as fh:
            fh.write(b"SIMPLE  =                    T")
        raise RuntimeError("writer crashed")

    monkeypatch.setattr(hp, "write_map", partial_maps)
    with pytest.raises(ModelFileError, match="writer crashed"):
        io.write_slice_maps(model, maps, overwrite=True)
    assert maps.read_bytes() == old_maps
    assert _leftovers(tmp_path, {"t.ecsv", "maps.fits"}) == []


def _corrupt(kind, saved, tmp_path, model):
    data = saved.read_bytes()
    p = tmp_path / f"{kind}.fits"
    if kind == "truncated":
        p.write_bytes(data[: len(data) // 2])
    elif kind == "truncated_tail":
        p.write_bytes(data[:-100])
    elif kind == "truncated_at_block":
        p.write_bytes(data[: 2880 * 2])
    elif kind == "bit_flip":
        b = bytearray(data)
        b[len(b) // 2] ^= 0xFF
        p.write_bytes(bytes(b))
    elif kind == "random_image":
        fits.PrimaryHDU(np.random.default_rng(0).random((20, 20))).writeto(p)
    elif kind == "csv_renamed":
        p.write_text("name,l,b,distance,ebv\nA,30,1,500,0.3\n")
    elif kind == "empty":
        p.write_bytes(b"")
    elif kind == "garbage":
        p.write_bytes(np.random.default_rng(1).bytes(5000))
    elif kind == "exported_table":
        io.export_table(model, p)
    elif kind == "slice_maps":
        io.write_slice_maps(model, p)
    elif kind == "missing":
        pass
    return p


@pytest.mark.parametrize("kind", ["truncated", "truncated_tail", "truncated_at_block", "bit_flip", "random_image",
                                  "csv_renamed", "empty", "garbage", "exported_table", "slice_maps", "missing"])
def test_corrupt_or_foreign_files_give_a_clear_error(kind, saved, tmp_path, model):
    p = _corrupt(kind, saved, tmp_path, model)
    with pytest.raises(ModelFileError) as info:
        io.load_model(p)
    msg = str(info.value)
    assert str(p) in msg and "Hint:" in msg
    assert "\n" not in msg  # one clear line
    assert info.value.__cause__ is None or isinstance(info.value.__cause__, ModelFileError)


def test_error_messages_say_what_is_wrong(saved, tmp_path, model):
    assert "truncated" in str(pytest.raises(ModelFileError, io.load_model, _corrupt("truncated", saved, tmp_path, model)).value)
    assert "checksums do not match" in str(
        pytest.raises(ModelFileError, io.load_model, _corrupt("bit_flip", saved, tmp_path, model)).value)
    assert "text file" in str(
        pytest.raises(ModelFileError, io.load_model, _corrupt("csv_renamed", saved, tmp_path, model)).value)
    assert "not a dustkit model" in str(
        pytest.raises(ModelFileError, io.load_model, _corrupt("random_image", saved, tmp_path, model)).value)


# ----------------------------------------------------------------------------- exported tables

@pytest.mark.parametrize("suffix", ["ecsv", "fits", "csv"])
def test_export_round_trip_is_exact(model, tmp_path, suffix):
    path = io.export_table(model, tmp_path / f"table.{suffix}")
    expect = model.to_table()
    got = Table.read(path, format="ascii.csv" if suffix == "csv" else None)
    assert got.colnames == expect.colnames == [
        "pixel", "l", "b", "distance_min", "distance_max", "av_near", "av", "av_err", "differential", "n_tracers"]
    assert len(got) == len(model.informed_pixels()) * model.grid_.n_bins
    for c in expect.colnames:
        want = np.asarray(getattr(expect[c], "value", expect[c]))
        assert np.array_equal(np.asarray(got[c]), want), c
    if suffix == "ecsv":  # units and metadata kept
        back = QTable.read(path)
        assert back["av"].unit == u.mag and back["differential"].unit == u.mag / u.kpc
        assert back["distance_min"].unit == u.pc
        assert (back.meta["nside"], back.meta["ordering"], back.meta["coordsys"]) == (16, "RING", "G")
        assert back.meta["law"] == "ccm89" and "statistical" in back.meta["caution"]
    if suffix == "fits":
        assert got["av"].unit == u.mag
        with fits.open(path) as hdul:
            h = hdul[1].header
            assert (h["NSIDE"], h["ORDERING"], h["COORDSYS"], h["LAW"]) == (16, "RING", "G", "ccm89")
    # the pixel centres are the HEALPix pixel centres of the model's NSIDE and ordering
    lc, bc = hp.pix2ang(16, np.asarray(got["pixel"]), lonlat=True)
    assert np.allclose(np.asarray(got["l"]), lc) and np.allclose(np.asarray(got["b"]), bc)


def test_export_format_argument_and_bad_suffix(model, tmp_path):
    path = io.export_table(model, tmp_path / "table.txt", format="csv")
    assert Table.read(path, format="ascii.csv").colnames[0] == "pixel"
    with pytest.raises(ModelFileError, match="suffix '.xlsx'"):
        io.export_table(model, tmp_path / "table.xlsx")
    with pytest.raises(dustkit.ParameterError, match="'format' parameter"):
        io.export_table(model, tmp_path / "table.dat", format="xls")
    with pytest.raises(ModelFileError, match="already exists"):
        io.export_table(model, path, format="csv")


# ----------------------------------------------------------------------------- slice maps

def test_slice_maps_open_with_healpy(model, tmp_path):
    g = model.grid_
    path = io.write_slice_maps(model, tmp_path / "maps.fits")
    informed = np.zeros(g.npix, bool)
    informed[model.informed_pixels()] = True
    for k in (0, 3, g.n_edges - 1):
        m, header = hp.read_map(path, field=k, h=True, nest=None)
        h = dict(header)
        assert (h["NSIDE"], h["ORDERING"], h["COORDSYS"]) == (16, "RING", "G")
        assert (h["PIXTYPE"], h["INDXSCHM"]) == ("HEALPIX", "IMPLICIT")
        assert h[f"DIST{k:04d}"] == g.distance_edges[k]
        assert m.size == 12 * 16**2  # full sky, N_pix = 12 NSIDE^2 (Gorski et al. 2005)
        assert np.array_equal(m[informed], model.av_[informed, k])
        assert np.all(m[~informed] == hp.UNSEEN)
        err = hp.read_map(path, field=g.n_edges + k)
        assert np.array_equal(err[informed], model.av_err_[informed, k])


def test_slice_maps_nested_and_unmasked(nested_model, tmp_path):
    g = nested_model.grid_
    path = io.write_slice_maps(nested_model, tmp_path / "maps.fits", mask_uninformed=False, errors=False)
    m, header = hp.read_map(path, field=2, h=True, nest=True)
    assert dict(header)["ORDERING"] == "NESTED"
    assert np.array_equal(m, nested_model.av_[:, 2])
    ring = hp.read_map(path, field=2)  # healpy reorders to RING on request
    assert np.array_equal(ring, hp.reorder(nested_model.av_[:, 2], n2r=True))
    with fits.open(path) as hdul:
        assert len(hdul[1].columns) == g.n_edges


def _imports(tree):
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            yield from (a.name.split(".")[0] for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            yield node.module.split(".")[0]


def test_io_never_imports_plotting_or_widgets_and_cli_only_lazily():
    # layering rule of the project (DESIGN.md): computation modules never import these, not even lazily
    io_tree = ast.parse(Path(io.__file__).read_text())
    assert not {"matplotlib", "ipywidgets", "IPython"} & set(_imports(io_tree))
    # the command line imports matplotlib only inside the commands that draw
    import dustkit.cli

    cli_tree = ast.parse(Path(dustkit.cli.__file__).read_text())
    top = [n for n in cli_tree.body if isinstance(n, (ast.Import, ast.ImportFrom))]
    assert "matplotlib" not in set(_imports(ast.Module(body=top, type_ignores=[])))
    assert "matplotlib" in set(_imports(cli_tree))


def test_colour_excess_tracers_keep_their_temperatures_through_the_file(tmp_path):
    # E(BP-RP) tracers with a temperature per star: the file keeps the temperatures, so the
    # loaded tracers re-derive A_V under another law exactly as the original ones
    from dustkit.bands import av_to_excess

    t = simulate_tracers(FIELD, 200, l_range=(20, 60), b_range=(-8, 8), distance_max=4000, rng=5,
                         name_prefix="Testfield")
    teff = np.random.default_rng(5).uniform(3500.0, 12000.0, len(t))
    ebprp, ebprp_err = av_to_excess(3.1 * np.asarray(t["ebv"]), 3.1 * np.asarray(t["ebv_err"]), "BP", "RP",
                                    temperature=teff * u.K)
    t["E(BP-RP)"], t["e_E(BP-RP)"], t["teff"] = ebprp * u.mag, ebprp_err * u.mag, teff
    t.remove_columns(["ebv", "ebv_err"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ts = read_tracers(t)
        model = ExtinctionModel(nside=8, distance_max=3000 * u.pc, distance_step=500 * u.pc, quiet=True).fit(ts)
    path = io.save_model(model, tmp_path / "bprp.fits")
    loaded = io.load_model(path)
    t1, t2 = model.tracers_, loaded.tracers_
    assert t2.excess_kind == "E(BP-RP)" and t2.excess_color == ("BP", "RP")
    np.testing.assert_array_equal(t2.temperature, t1.temperature)
    with fits.open(path) as hdul:
        assert hdul["TRACERS"].columns["TEMPERATURE"].unit == "K"
    np.testing.assert_array_equal(t2.with_law("fitzpatrick99", 3.3).av, t1.with_law("fitzpatrick99", 3.3).av)


def test_av_tracers_round_trip_without_repeated_columns(tmp_path):
    # tracers given as A_V: their "excess" is A_V itself, so the file stores it once (EXCSAME) and, when every
    # input row was kept in order, no ROW column; loading gives back the same arrays bit for bit (lossless round
    # trip, common practice for model files). A rejected row keeps ROW, since the row numbers then skip it.
    rng = np.random.default_rng(3)
    n = 200
    t = Table({"l": rng.uniform(20, 60, n), "b": rng.uniform(-8, 8, n), "distance": rng.uniform(200, 3000, n) * u.pc,
               "distance_err": rng.uniform(20, 200, n) * u.pc, "av": rng.uniform(0.1, 3, n), "av_err": np.full(n, 0.1)})
    for kept_all in (True, False):
        if not kept_all:
            t["av"][17] = np.nan  # rejected
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            tracers = read_tracers(t)
            m = ExtinctionModel(nside=8, distance_max=3000 * u.pc, distance_step=500 * u.pc, quiet=True).fit(tracers)
        path = io.save_model(m, tmp_path / f"av_{kept_all}.fits")
        with fits.open(path) as hdul:
            cols = hdul["TRACERS"].columns.names
            assert hdul["TRACERS"].header["EXCSAME"] is True
        assert "EXCESS" not in cols and "EXCESS_ERR" not in cols
        assert ("ROW" in cols) is (not kept_all)
        t2 = io.load_model(path).tracers_
        for attr in ("l", "b", "distance", "distance_err", "av", "av_err", "excess", "excess_err", "row", "name"):
            assert np.array_equal(getattr(tracers, attr), getattr(t2, attr)), attr
        assert t2.excess_kind == "A_V" and len(t2) == n - (not kept_all)
        assert (17 in np.asarray(t2.row)) is kept_all


def test_model_saved_under_a_gzip_name_loads_back(model, tmp_path):
    # astropy writes a FITS file whose name ends in '.gz' gzip-compressed (astropy.io.fits docs: compressed
    # files), so save_model('model.fits.gz') makes one; load_model must read it back bit for bit, and a
    # damaged or foreign compressed file must still give one clear line
    import gzip

    p = io.save_model(model, tmp_path / "model.fits.gz")
    assert p.read_bytes()[:2] == b"\x1f\x8b"  # gzip magic number (RFC 1952)
    _assert_same_answers(model, io.load_model(p))
    cut = tmp_path / "cut.fits.gz"
    cut.write_bytes(p.read_bytes()[: p.stat().st_size // 2])
    text = tmp_path / "table.csv.gz"
    text.write_bytes(gzip.compress(b"l,b,distance\n1,2,3\n"))
    for bad in (cut, text):
        with pytest.raises(ModelFileError) as info:
            io.load_model(bad)
        msg = str(info.value)
        assert str(bad) in msg and "Hint:" in msg and "\n" not in msg


@pytest.mark.parametrize("name", ["model.ecsv", "model.csv", "model.parquet", "MODEL.VOT"])
def test_model_file_named_as_a_table_is_refused(model, tmp_path, name):
    # a model file is FITS; written under a table's suffix it would be taken for that table (and CSV/ECSV
    # readers would choke on it), so the name is refused before anything is written
    from dustkit.exceptions import FileFormatError

    with pytest.raises(FileFormatError, match=r"\.fits.*export"):
        io.save_model(model, tmp_path / name)
    assert list(tmp_path.iterdir()) == []
    assert io.save_model(model, tmp_path / "model.fit").exists()  # a FITS suffix (FITS standard) is fine


def test_slice_maps_named_as_a_table_are_refused(model, tmp_path):
    # slice maps are a FITS binary table in the HEALPix convention (healpy.read_map reads them); under a
    # CSV or ECSV name they would be taken for a text table
    from dustkit.exceptions import FileFormatError

    for name in ("maps.ecsv", "maps.csv"):
        with pytest.raises(FileFormatError, match=r"slice-map file is FITS"):
            io.write_slice_maps(model, tmp_path / name)
    assert list(tmp_path.iterdir()) == []


def test_a_loaded_models_tracers_still_say_how_many_rows_were_rejected(tmp_path):
    # the rejected rows are not kept in a model file, but their count by reason is: the loaded
    # tracers' summary reports it instead of "0 rejected" (dropped rows are counted and reported,
    # never silently lost; common practice)
    rng = np.random.default_rng(4)
    t = Table({"name": [f"Inv {i}" for i in range(60)], "l": rng.uniform(10, 50, 60), "b": rng.uniform(-3, 3, 60),
               "distance": rng.uniform(300, 3000, 60) * u.pc, "ebv": rng.uniform(0.1, 1.2, 60)})
    t["ebv"][[3, 9, 11]] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tracers = dustkit.read_tracers(t)
        model = dustkit.build_model(tracers, model="binned", quiet=True)
        dustkit.save_model(model, tmp_path / "m.fits")
        loaded = dustkit.load_model(tmp_path / "m.fits")
    text = loaded.tracers_.summary()
    assert "(60 input rows, 3 rejected)" in text.splitlines()[0]
    assert "3  missing value in 'ebv'" in text and "Rejected:  none" not in text
