"""Out-of-core and distributed builds (dustkit.scale) against the in-memory build.

The catalogues are simulated from an invented region (a dust layer plus clouds with
made-up positions), written to Parquet / FITS in a temporary folder and read back in
chunks. The checks: the chunked build equals the in-memory build of the same tracers, a
two-worker dask cluster gives the same model as one process, bad rows are rejected like
``read_tracers`` does and counted, and bad parameters get clear errors.
"""

import re
from pathlib import Path
import warnings

import numpy as np
import pandas as pd
import pytest
from astropy import units as u
from astropy.table import Table

from dustkit import CatalogError, ParameterError
from dustkit._errors import AssumptionWarning, RowsRejectedWarning
from dustkit.layer import fit_layer
from dustkit.binned.folds import HeldOut
from dustkit.binned.statistics import nominal_statistics
from dustkit.model import ExtinctionModel
from dustkit.scale import build_from_fits, build_from_parquet, fold_of_rows
from dustkit.tracers.rules import validate_rows as _validate
from dustkit.simulate import Cloud, DustField, simulate_tracers
from dustkit.tracers import TracerSet, read_tracers

# An invented region: an exponential layer (a0 = 1 mag/kpc, h = 120 pc, z_sun = 20 pc) and
# three clouds with made-up positions.
FIELD = DustField(
    a0=1.0, h=120.0, z_sun=20.0,
    clouds=(Cloud(30, 1, 600, 3.0, 30, 1.2), Cloud(50, -3, 1500, 2.0, 40, 0.8), Cloud(60, 2, 2500, 4.0, 40, 1.0)),
)
# every Parquet build announces that a bare distance column is taken in pc, as read_tracers does (checked below)
pytestmark = pytest.mark.filterwarnings("ignore:Column 'distance' has no unit:dustkit._errors.AssumptionWarning")

PARAMS = dict(nside=16, distance_max=4000 * u.pc, distance_step=250 * u.pc)
HELDOUT = 1500  # held-out rows of the cross-validation (keeps the calibration quick)
COLUMNS = ("l", "b", "distance", "distance_err", "av", "av_err")


from dustkit.tracers.rules import floor_errors  # noqa: E402


def _arrays(tracers):
    return tuple(np.asarray(getattr(tracers, k), float) for k in COLUMNS)


@pytest.fixture(scope="module")
def catalogue(tmp_path_factory):
    """20 000 simulated tracers as three Parquet files with several row groups each."""
    t = simulate_tracers(FIELD, 20_000, l_range=(10, 70), b_range=(-10, 10), distance_max=4000, rng=7)
    tracers = read_tracers(t)
    df = pd.DataFrame({k: v for k, v in zip(COLUMNS, _arrays(tracers))})
    folder = tmp_path_factory.mktemp("catalogue")
    for i, rows in enumerate(np.array_split(np.arange(len(df)), 3)):
        df.iloc[rows].to_parquet(folder / f"part-{i:02d}.parquet", row_group_size=3000)
    return tracers, df, folder


@pytest.fixture(scope="module")
def chunked(catalogue):
    _, _, folder = catalogue
    # 2 500-row chunks: chunks cross row groups, and files end inside a chunk's span
    return build_from_parquet(folder, chunk_size=2500, heldout_sample=HELDOUT, quiet=True, **PARAMS)


def _in_memory(tracers, heldout_rows, random_state=0, n_folds=5):
    """The in-memory bin-scatter build: all tracers accumulated at once, then finished.

    The same steps as ExtinctionModel.fit (layer fit, the statistics of every tracer and of
    the held-out ones, the public seam `fit_statistics`) with the given held-out rows, so the result can be
    compared with the chunked build exactly.
    """
    l, b, d, de, av, ae = _arrays(tracers)
    m = ExtinctionModel(uncertainty="bin-scatter", n_folds=n_folds, random_state=random_state, quiet=True, **PARAMS)
    grid = m.make_grid()
    layer = fit_layer(tracers, random_state=random_state)
    h = heldout_rows
    stats = nominal_statistics(grid, layer, l, b, d, av, ae, held=h)
    total = stats.total
    m.fit_statistics(stats, layer, HeldOut(l[h], b[h], d[h], de[h], av[h], ae[h], np.zeros(h.size, int)),
                     m.fit_plan(l.size), rng=np.random.default_rng(random_state))
    return m, total


def test_chunked_parquet_folder_equals_in_memory_build(catalogue, chunked):
    tracers, _, _ = catalogue
    info = chunked.build_info_
    assert info["n_rows"] == info["n_used"] == len(tracers) and info["n_rejected"] == 0
    assert len(info["files"]) == 3 and info["n_chunks"] == 9  # 6667-row files in 2500-row chunks
    ref, stats = _in_memory(tracers, info["heldout_rows"])
    # the layer is fitted to the same tracers (the whole catalogue is smaller than the sample)
    assert chunked.layer_.as_dict() == pytest.approx(ref.layer_.as_dict(), rel=1e-12)
    # counts are integer sums: exact (np.bincount of pixel x bin, common practice)
    l, b, d = _arrays(tracers)[:3]
    k, f = ref.grid_.edge_position(d)
    inside = f <= 1
    direct = np.bincount(ref.grid_.pixel(l, b)[inside] * ref.grid_.n_bins + k[inside],
                         minlength=ref.grid_.npix * ref.grid_.n_bins).reshape(ref.grid_.npix, -1)
    assert np.array_equal(chunked.counts_, direct)
    assert chunked.counts_.sum() == np.count_nonzero(inside)
    # parts defined by sums: equal to floating-point summation tolerance
    assert np.allclose(chunked.n_tracers_, ref.n_tracers_, rtol=1e-9, atol=1e-12)
    assert np.allclose(chunked.av_, ref.av_, rtol=1e-9, atol=1e-12)
    # the same smoothing chosen, and the calibrated errors agree (an optimiser sits in between)
    assert (chunked.sky_passes_, chunked.walk_variance_, chunked.distance_smoothing_) == (
        ref.sky_passes_, pytest.approx(ref.walk_variance_, rel=1e-12), ref.distance_smoothing_)
    assert np.allclose(chunked.av_err_, ref.av_err_, rtol=1e-6, atol=1e-6)
    assert chunked.uncertainty_scheme_ == "bin-scatter"
    rep, rep_ref = chunked.build_report_, ref.build_report_
    assert rep["beyond_grid"] == rep_ref["beyond_grid"] > 0 and rep["notes"] == rep_ref["notes"]
    assert rep["max_isotonic_shift"] == pytest.approx(rep_ref["max_isotonic_shift"], rel=1e-6, abs=1e-9)
    # and the model answers like the in-memory one at arbitrary positions
    lq, bq, dq = np.array([31.0, 50.5, 64.0]), np.array([0.7, -2.5, 1.0]), np.array([800.0, 2000.0, 3500.0])
    a1, e1 = chunked.av(lq * u.deg, bq * u.deg, dq * u.pc)
    a2, e2 = ref.av(lq * u.deg, bq * u.deg, dq * u.pc)
    assert np.allclose(a1.value, a2.value, rtol=1e-9) and np.allclose(e1.value, e2.value, rtol=1e-6, atol=1e-6)


def test_result_does_not_depend_on_chunk_size(catalogue, chunked):
    _, _, folder = catalogue
    other = build_from_parquet(folder, chunk_size=7000, heldout_sample=HELDOUT, quiet=True, **PARAMS)
    assert other.build_info_["n_chunks"] == 3
    assert np.array_equal(other.build_info_["heldout_rows"], chunked.build_info_["heldout_rows"])
    assert np.array_equal(other.counts_, chunked.counts_)
    assert np.allclose(other.av_, chunked.av_, rtol=1e-9, atol=1e-12)
    assert np.allclose(other.av_err_, chunked.av_err_, rtol=1e-6, atol=1e-6)


def test_same_as_extinction_model_fit_on_a_small_catalogue(tmp_path):
    # with every tracer held out (the in-memory default below 50 000 tracers) the chunked
    # build and ExtinctionModel.fit see the same layer, the same sums and the same held-out set
    t = simulate_tracers(FIELD, 2500, l_range=(20, 60), b_range=(-8, 8), distance_max=4000, rng=3)
    tracers = read_tracers(t)
    pd.DataFrame(dict(zip(COLUMNS, _arrays(tracers)))).to_parquet(tmp_path / "small.parquet", row_group_size=700)
    fit = ExtinctionModel(uncertainty="bin-scatter", quiet=True, **PARAMS).fit(tracers)
    big = build_from_parquet(tmp_path / "small.parquet", chunk_size=1000, quiet=True, **PARAMS)
    assert big.build_info_["heldout_sample"] == len(tracers)
    assert big.layer_.as_dict() == pytest.approx(fit.layer_.as_dict(), rel=1e-12)
    assert np.array_equal(big.counts_, fit.counts_)
    # the final arrays come from the sums over all folds: equal whatever the folds
    assert np.allclose(big.n_tracers_, fit.n_tracers_, rtol=1e-9, atol=1e-12)
    assert np.allclose(big.av_, fit.av_, rtol=1e-9, atol=1e-12)
    assert np.allclose(big.av_err_, fit.av_err_, rtol=1e-6, atol=1e-6)  # same folds: same calibration
    # tracers beyond the last edge (observed distances scatter past 4 kpc) are bounds, not
    # measurements: both paths leave the same ones out and say so
    far = int(np.count_nonzero(_arrays(tracers)[2] > 4000))
    assert far > 0 and big.build_report_["beyond_grid"] == fit.build_report_["beyond_grid"] == far
    assert big.scatter_ == pytest.approx(fit.scatter_, rel=1e-6, abs=1e-9)


def test_two_worker_local_cluster_equals_single_process(catalogue, chunked):
    distributed = pytest.importorskip("distributed")
    _, _, folder = catalogue
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # cluster start-up chatter
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                      dashboard_address=None) as cluster, distributed.Client(cluster) as client:
            remote = build_from_parquet(folder, chunk_size=2500, client=client, heldout_sample=HELDOUT, quiet=True,
                                        **PARAMS)
    assert remote.build_info_["scheduler"] == "distributed" and remote.build_info_["n_parallel"] == 2
    assert np.array_equal(remote.counts_, chunked.counts_)
    assert np.array_equal(remote.build_info_["heldout_rows"], chunked.build_info_["heldout_rows"])
    assert np.allclose(remote.av_, chunked.av_, rtol=1e-9, atol=1e-12)
    assert np.allclose(remote.n_tracers_, chunked.n_tracers_, rtol=1e-9, atol=1e-12)
    assert np.allclose(remote.av_err_, chunked.av_err_, rtol=1e-6, atol=1e-6)


def test_fits_table_in_chunks_with_units(catalogue, chunked, tmp_path):
    _, df, _ = catalogue
    t = Table.from_pandas(df)
    t["distance"] = t["distance"] / 1000.0  # kpc, declared with TUNIT: converted to pc
    t["distance"].unit = u.kpc
    t["distance_err"].unit = u.pc  # (an error column without a unit takes its value column's, as read_tracers reads it)
    t.rename_column("av", "A_V")
    t.write(tmp_path / "catalogue.fits")
    m = build_from_fits(tmp_path / "catalogue.fits", columns={"av": "A_V"}, chunk_size=4000,
                        heldout_sample=HELDOUT, quiet=True, **PARAMS)
    assert m.build_info_["n_chunks"] == 5
    assert np.array_equal(m.counts_, chunked.counts_)
    # kpc -> pc changes distances in their last bit, and the layer fit with them (~1e-12)
    assert np.allclose(m.av_, chunked.av_, rtol=1e-8, atol=1e-8)


def test_bad_rows_rejected_like_read_tracers_and_counted(tmp_path, monkeypatch):
    rng = np.random.default_rng(5)
    n = 400
    df = pd.DataFrame({
        "l": rng.uniform(20, 60, n), "b": rng.uniform(-5, 5, n), "distance": rng.uniform(200, 3000, n),
        "distance_err": rng.uniform(20, 200, n), "av": rng.uniform(0.1, 3, n), "av_err": rng.uniform(0.02, 0.2, n),
    })
    df.loc[0, "l"] = np.nan
    df.loc[1, "b"] = 95.0
    df.loc[2, "distance"] = -10.0
    df.loc[3, "av_err"] = -0.1
    df.loc[4, "av"] = 500.0
    df.loc[5, "distance"] = 3e5
    df.loc[6, "l"] = -200.0
    df.loc[7, "distance_err"] = 0.0  # a zero error takes the default, the row is kept
    df.loc[8, "av_err"] = np.nan
    df.loc[9, "l"] = -20.0  # wrapped to 340
    # the row checks equal read_tracers' (TracerSet.from_arrays) on the same values
    arrays = {k: df[k].to_numpy(float) for k in COLUMNS}
    code, clean = _validate(arrays, 3.1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ts = TracerSet.from_arrays(*(arrays[k] for k in COLUMNS))
    assert np.count_nonzero(code >= 0) == len(ts.rejected) == 7
    assert np.array_equal(np.sort(np.nonzero(code >= 0)[0]), np.sort(np.asarray(ts.rejected["row"])))
    # ... with the fits' error floors applied, as every fit applies them (tracers.rules.floor_errors)
    l, b, d, de, av, ae = _arrays(ts)
    de, ae = floor_errors(d, de, ae, warn=False)
    for mine, theirs in zip(clean, (l, b, d, de, av, ae)):
        assert np.array_equal(mine, theirs)
    # the build rejects, counts and reports them
    df.to_parquet(tmp_path / "bad.parquet")
    bars = []

    class Bar:  # records the progress reported by the build
        def __init__(self, total=None, desc=None, quiet=None):
            self.total, self.desc, self.n = total, desc, 0
            bars.append(self)

        def update(self, k=1):
            self.n += k

        def close(self):
            pass

    monkeypatch.setattr("dustkit.scale.progress", Bar)
    with pytest.warns(RowsRejectedWarning, match="7 of 400 rows rejected"), \
            pytest.warns(AssumptionWarning, match="1 rows have an empty or zero error in 'distance_err'"), \
            pytest.warns(AssumptionWarning, match="Column 'distance' has no unit; assuming the distances are in pc"):
        m = build_from_parquet(tmp_path / "bad.parquet", chunk_size=150, quiet=False, sky_passes=(0, 1), **PARAMS)
    # progress is reported per chunk (400 rows in 150-row chunks), for both passes
    assert [(b.desc, b.total, b.n) for b in bars] == [
        ("reading and sampling (pass 1 of 2)", 3, 3), ("accumulating tracers (pass 2 of 2)", 3, 3)]
    info = m.build_info_
    assert (info["n_rows"], info["n_used"], info["n_rejected"]) == (400, 393, 7)
    assert sum(info["rejected_by_reason"].values()) == 7
    assert sorted(info["rejected_examples"]["row"]) == [0, 1, 2, 3, 4, 5, 6]
    assert m.counts_.sum() <= 393 and len(m.tracers_) == 393
    assert info["default_errors"] == {"distance_err": 1, "av_err": 1}


def test_folds_from_row_numbers():
    # deterministic, independent of how rows are split, about uniform (common practice)
    rows = np.arange(200_000)
    f = fold_of_rows(rows, 5, random_state=0)
    assert np.array_equal(f[1000:2000], fold_of_rows(np.arange(1000, 2000), 5, random_state=0))
    share = np.bincount(f, minlength=5) / rows.size
    assert np.all(np.abs(share - 0.2) < 0.005)
    other = fold_of_rows(rows, 5, random_state=1)
    assert 0.15 < np.mean(other == f) < 0.25  # another seed gives an unrelated assignment


def test_chunked_build_takes_the_in_memory_seed_and_refuses_none_before_reading(catalogue, monkeypatch):
    # The in-memory build (ExtinctionModel.fit) refuses random_state=None: the same seed must give the same
    # model (common practice for reproducible cross-validation). The chunked build hashed its folds with seed 0
    # for None, fitted the layer unseeded, read and summed the whole catalogue and only then refused it.
    import dustkit.scale as scale

    _, _, folder = catalogue
    with pytest.raises(ParameterError, match="'random_state' parameter must be an integer >= 0"):
        fold_of_rows(np.arange(100), 5, random_state=None)

    def no_reading(*args, **kwargs):
        raise AssertionError("the catalogue was read before the seed was checked")

    monkeypatch.setattr(scale, "_run_chains", no_reading)
    for bad in (None, -1, 1.5):
        with pytest.raises(ParameterError, match="'random_state' parameter must be an integer >= 0"):
            build_from_parquet(folder, random_state=bad, quiet=True, **PARAMS)


def test_clear_errors(catalogue, tmp_path):
    _, df, folder = catalogue
    # the chunks are read by read_tracers' rules: the same error for a file without a reddening column
    with pytest.raises(CatalogError, match=r"No reddening column found in .*noav.parquet.*columns="):
        df.drop(columns=["av", "av_err"]).iloc[:100].to_parquet(tmp_path / "noav.parquet")
        build_from_parquet(tmp_path / "noav.parquet", quiet=True)
    with pytest.raises(ParameterError, match="The 'uncertainty' parameter must be 'bin-scatter'"):
        build_from_parquet(folder, uncertainty="monte-carlo", quiet=True)
    with pytest.raises(ParameterError, match="The 'chunk_size' parameter must be an integer"):
        build_from_parquet(folder, chunk_size=0, quiet=True)
    with pytest.raises(ParameterError, match="'n_draws' parameter"):
        build_from_parquet(folder, n_draws=10, quiet=True)
    (tmp_path / "empty").mkdir()
    with pytest.raises(CatalogError, match="holds no Parquet files"):
        build_from_parquet(tmp_path / "empty", quiet=True)
    with pytest.raises(CatalogError, match="No such file or folder"):
        build_from_parquet(tmp_path / "missing", quiet=True)


def test_chunked_build_reads_like_read_tracers(tmp_path):
    # one small catalogue of parallaxes and E(B-V), read in memory and in 100-row chunks: the same rows
    # accepted, rejected and merged, the same assumptions, the same prior-based distances
    # (Bailer-Jones 2015 prior for every parallax, also <= 0; duplicates as the reader finds them)
    rng = np.random.default_rng(11)
    n = 300
    df = pd.DataFrame({"name": [f"C{i}" for i in range(n)], "l": rng.uniform(20, 60, n), "b": rng.uniform(-5, 5, n),
                       "parallax": rng.uniform(0.3, 2.0, n), "parallax_err": rng.uniform(0.02, 0.1, n),
                       "ebv": rng.uniform(0.1, 1.0, n), "ebv_err": rng.uniform(0.02, 0.05, n)})
    df.loc[5, "l"] = np.nan  # rejected
    df.loc[150, "ebv"] = 50.0  # rejected (outside the E(B-V) limits)
    df.loc[40, "parallax"] = -0.1  # kept: a distance from the prior
    def rename_near(row, like, dl, db):  # the name of row `like`, a few arcmin from it (two compilations' centres)
        df.loc[row, ["name", "l", "b"]] = [df.loc[like, "name"], df.loc[like, "l"] + dl, df.loc[like, "b"] + db]

    rename_near(11, 10, 0.05, 0.0)  # the same name within a chunk: merged
    df.loc[31] = df.loc[30]  # an exact copy within a chunk
    df.loc[200:204] = df.loc[20:24].to_numpy()  # exact copies of rows of another chunk
    rename_near(250, 60, 0.08, 0.0)  # the same name in two chunks (other values): merged by inverse-variance means
    rename_near(120, 10, -0.1, 0.05)  # a third C10, in another chunk than the first two
    rename_near(130, 22, 0.0, 0.1)  # the same name as row 22 and its exact copy 202, in a third chunk
    rename_near(270, 21, 0.02, -0.02)  # merged in its chunk with 201, an exact copy of row 21 of another chunk
    df.to_parquet(tmp_path / "cat.parquet", row_group_size=64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ts = read_tracers(tmp_path / "cat.parquet")
        m = build_from_parquet(tmp_path / "cat.parquet", chunk_size=100, quiet=True, **PARAMS)
    info = m.build_info_
    assert (info["n_used"], info["n_rejected"], info["n_merged"]) == (len(ts), len(ts.rejected), ts.meta["n_merged"])
    assert (len(ts), len(ts.rejected), ts.meta["n_merged"]) == (287, 2, 11)
    assert info["n_used"] + info["n_rejected"] + info["n_merged"] == n and info["cross_chunk_copies"] == 5
    assert info["same_name_apart"] == ts.meta["same_name_apart"] == 0
    # the groups whose measurements disagree counted alike: the four of distinct measurements (C10, C60, C22 with
    # row 130, C21 with row 270), whose random values disagree far beyond their errors, have their errors scaled up
    assert (info["n_scaled_groups"], ts.meta["n_scaled_groups"]) == (4, 4)
    # the duplicates reported alike: rows in groups of two or more, and groups
    assert (info["duplicate_rows"], info["duplicate_groups"]) == (len(ts.duplicates),
                                                                  np.unique(np.asarray(ts.duplicates["group"])).size)
    assert info["rejected_by_reason"] == ts.meta["rejected_by_reason"]
    assert set(info["assumptions"]) == set(ts.meta["assumptions"])
    assert any("Bailer-Jones 2015" in a for a in info["assumptions"])
    # the catalogue is smaller than the sample: the model's tracers are all of them, with the same distances
    np.testing.assert_allclose(np.sort(m.tracers_.distance), np.sort(ts.distance), rtol=1e-12)
    # the tracers merged across chunks too: the same values and positions (matched by distance)
    a, c = np.argsort(np.asarray(m.tracers_.distance)), np.argsort(np.asarray(ts.distance))
    for k in ("av", "av_err", "distance_err", "l", "b"):
        np.testing.assert_allclose(np.asarray(getattr(m.tracers_, k))[a], np.asarray(getattr(ts, k))[c], rtol=1e-10,
                                   err_msg=k)
    # the reader's refusals stop a chunked build too: kpc without a unit, a modulus that does not say which
    kpc = pd.DataFrame({"l": df["l"].fillna(30.0), "b": df["b"], "distance": rng.uniform(0.5, 3.0, n),
                        "av": df["ebv"].clip(upper=1.0) * 3.1})
    kpc.to_parquet(tmp_path / "kpc.parquet")
    with pytest.raises(CatalogError, match="distance_unit='kpc'"):
        build_from_parquet(tmp_path / "kpc.parquet", chunk_size=100, quiet=True, **PARAMS)
    kpc.rename(columns={"distance": "dm"}).assign(dm=lambda x: 10 + x["dm"]).to_parquet(tmp_path / "dm.parquet")
    with pytest.raises(CatalogError, match="distance_modulus_kind"):
        build_from_parquet(tmp_path / "dm.parquet", chunk_size=100, quiet=True, **PARAMS)


def test_same_name_far_apart_kept_apart_alike_in_memory_and_in_chunks(tmp_path, monkeypatch):
    # an invented catalogue put together from surveys that reuse names, read in memory and in 100-row chunks: rows
    # of one name are one object only within 30 arcmin of each other (two compilations' centres of one cluster
    # differ by arcminutes; reused IDs name objects far apart: common practice), linked through chains of such
    # rows; both reads find the same tracers, merged values, counts and the same report
    rng = np.random.default_rng(8)
    n = 300
    df = pd.DataFrame({"name": [f"S{i}" for i in range(n)], "l": rng.uniform(20, 60, n), "b": rng.uniform(-5, 5, n),
                       "distance": rng.uniform(300, 3500, n), "distance_err": rng.uniform(40, 200, n),
                       "av": rng.uniform(0.1, 3.0, n), "av_err": rng.uniform(0.05, 0.2, n)})

    def put(row, name, l, b):
        df.loc[row, ["name", "l", "b"]] = [name, l, b]

    put(5, "S250", 25.0, 0.0)  # kept apart: chunks 0 and 2, 30 deg apart
    put(250, "S250", 55.0, 0.0)
    put(7, "S7", 21.0, 1.0)  # kept apart: one chunk, 4 deg apart
    put(8, "S7", 25.0, 1.0)
    put(160, "S160", 40.0, 3.0)  # merged across chunks (2 arcmin), and a third S160 kept apart
    put(9, "S160", 40.0 + 2 / 60, 3.0)
    put(170, "S160", 50.0, -3.0)
    put(20, "S20", 30.0, -1.0)  # a chain across three chunks, 20 arcmin steps (ends 40 arcmin apart): merged
    put(120, "S20", 30.0 + 20 / 60, -1.0)
    put(220, "S20", 30.0 + 40 / 60, -1.0)
    df.loc[230] = df.loc[30]  # an exact copy of row 30 in another chunk, and a far row of its name
    put(231, "S30", 58.0, 4.0)
    put(40, "S40", 45.0, 2.0)  # merged in chunk 0 (24 arcmin); row 140 is 27 arcmin from row 41 but 39 arcmin
    put(41, "S40", 45.4, 2.0)  # from their merged position: one object, as row 41 is within the limit
    put(140, "S40", 45.85, 2.0)
    df.to_parquet(tmp_path / "reused.parquet", row_group_size=64)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        ts = read_tracers(tmp_path / "reused.parquet", distance_unit="pc")
        n_memory = len(record)
        m = build_from_parquet(tmp_path / "reused.parquet", chunk_size=100, quiet=True, distance_unit="pc", **PARAMS)
    said = [str(w.message) for w in record if "share their name" in str(w.message)]
    info = m.build_info_
    # merged away: 9 (into 160), 120 and 220 (into 20), 230 (copy of 30), 41 and 140 (into 40)
    assert (len(ts), len(ts.rejected), ts.meta["n_merged"]) == (294, 0, 6)
    assert (info["n_used"], info["n_rejected"], info["n_merged"]) == (294, 0, 6)
    # kept apart: 5 and 250; 7 and 8; 9, 160 and 170; 30, 230 and 231
    assert ts.meta["same_name_apart"] == info["same_name_apart"] == 10
    # the three groups of distinct (random, disagreeing) measurements have their errors scaled up in both reads
    assert (ts.meta["n_scaled_groups"], info["n_scaled_groups"]) == (3, 3)
    assert (info["duplicate_rows"], info["duplicate_groups"]) == (len(ts.duplicates),
                                                                  np.unique(np.asarray(ts.duplicates["group"])).size)
    assert set(info["assumptions"]) == set(ts.meta["assumptions"])
    # said once by each read, with the count of rows and names, an example and the hint
    assert len(said) == 2 and said[0] == said[1] and n_memory < len(record)
    assert said[0].startswith("10 rows share their name with rows more than 30 arcmin away") and "4 names" in said[0]
    assert "unique names" in said[0]
    names = np.asarray(ts.name)
    assert list(names).count("S250") == 2 and list(names).count("S160") == 2 and list(names).count("S20") == 1
    # the same tracers with the same merged values (matched by distance)
    a, c = np.argsort(np.asarray(m.tracers_.distance)), np.argsort(np.asarray(ts.distance))
    for k in ("distance", "av", "av_err", "distance_err", "l", "b"):
        np.testing.assert_allclose(np.asarray(getattr(m.tracers_, k))[a], np.asarray(getattr(ts, k))[c], rtol=1e-10,
                                   err_msg=k)
    # without pass 1's cache (large or distributed builds) the chunks' positions are read again: the same result
    import dustkit.scale

    monkeypatch.setattr(dustkit.scale, "CACHE_ROWS", 0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m2 = build_from_parquet(tmp_path / "reused.parquet", chunk_size=100, quiet=True, distance_unit="pc", **PARAMS)
    assert (m2.build_info_["n_used"], m2.build_info_["n_merged"], m2.build_info_["same_name_apart"]) == (294, 6, 10)
    np.testing.assert_allclose(np.sort(np.asarray(m2.tracers_.l)), np.sort(np.asarray(ts.l)), rtol=1e-10)


def test_units_written_by_astropy_into_parquet_are_read_in_chunks(tmp_path):
    # astropy keeps column units in a Parquet file's metadata (astropy.io.misc.parquet); a chunked read must take
    # them as Table.read does: distances in kpc are 1000 pc (IAU units), not a kpc-without-unit stop
    rng = np.random.default_rng(4)
    n = 300
    t = Table({"l": rng.uniform(20, 60, n) * u.deg, "b": rng.uniform(-5, 5, n) * u.deg,
               "distance": rng.uniform(0.5, 3.0, n) * u.kpc, "distance_err": np.full(n, 0.1) * u.kpc,
               "av": rng.uniform(0.1, 2.0, n) * u.mag, "av_err": np.full(n, 0.1) * u.mag})
    t.write(tmp_path / "units.parquet")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ts = read_tracers(tmp_path / "units.parquet")
        m = build_from_parquet(tmp_path / "units.parquet", chunk_size=100, quiet=True, **PARAMS)
    np.testing.assert_allclose(np.sort(np.asarray(m.tracers_.distance)), np.sort(1000.0 * np.asarray(t["distance"])),
                               rtol=1e-12)
    np.testing.assert_allclose(np.sort(np.asarray(ts.distance)), np.sort(np.asarray(m.tracers_.distance)), rtol=1e-12)


def test_null_cells_counted_alike_in_memory_and_in_chunks(tmp_path):
    # Parquet marks empty cells as nulls (Apache Parquet format: definition levels), which pandas, Spark and
    # database exports write for missing values. Both reads must drop the same rows for the same reasons, count
    # every dropped row, and treat a null name as no name (common practice: a missing value is not a value)
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(21)
    n = 300
    cols = {"name": [f"S{i}" for i in range(n)], "l": rng.uniform(20, 60, n), "b": rng.uniform(-5, 5, n),
            "distance": rng.uniform(200, 3000, n), "distance_err": rng.uniform(20, 200, n),
            "av": rng.uniform(0.1, 3, n), "av_err": rng.uniform(0.02, 0.2, n)}
    nulls = {"l": [3, 160], "b": [7], "distance": [12, 250], "av": [40, 41, 290], "av_err": [50, 180],
             "distance_err": [60], "name": [70, 71, 72, 210]}  # null names in two chunks, values unrelated
    arrays = {}
    for k, v in cols.items():
        mask = np.zeros(n, bool)
        mask[nulls[k]] = True
        arrays[k] = pa.array(v, mask=mask)
    pq.write_table(pa.table(arrays), tmp_path / "nulls.parquet", row_group_size=64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ts = read_tracers(tmp_path / "nulls.parquet")
        m = build_from_parquet(tmp_path / "nulls.parquet", chunk_size=100, quiet=True, **PARAMS)
    info = m.build_info_
    # 8 rows without a position, distance or A_V are rejected as missing; empty errors take the defaults;
    # the rows with a null name are four different tracers (named after their row), not one name repeated
    assert (len(ts), len(ts.rejected), ts.meta["n_merged"]) == (292, 8, 0)
    assert (info["n_used"], info["n_rejected"], info["n_merged"]) == (292, 8, 0)
    assert info["rejected_by_reason"] == ts.meta["rejected_by_reason"]
    assert sum(info["rejected_by_reason"].values()) == 8
    assert all("missing" in why for why in info["rejected_by_reason"])
    assert sorted(np.asarray(ts.rejected["row"]).tolist()) == [3, 7, 12, 40, 41, 160, 250, 290]
    assert info["default_errors"] == {"distance_err": 1, "av_err": 2}
    named = dict(zip(np.asarray(ts.row).tolist(), np.asarray(ts.name).tolist()))
    assert [named[r] for r in (70, 71, 72, 210)] == ["row 70", "row 71", "row 72", "row 210"]


def _invented_frame(seed, n, reddening, values, errors):
    """An invented field-star catalogue (a pandas frame) with a reddening column and its error."""
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"l": rng.uniform(20, 60, n), "b": rng.uniform(-5, 5, n),
                         "distance": rng.uniform(200, 3000, n), "distance_err": rng.uniform(20, 200, n),
                         reddening: rng.uniform(*values, n), f"{reddening}_err": rng.uniform(*errors, n)})


def test_model_file_of_a_chunked_build_records_the_catalogue_read(tmp_path):
    # the model file is what remains of a build: its record of the catalogue (rows rejected by reason, how
    # the reddening was read, duplicates) must be the catalogue's, as an in-memory build's file has it, not
    # that of the sample of already-checked A_V arrays the chunked build keeps as tracers_
    from dustkit.io import load_model, save_model

    n = 300
    df = _invented_frame(8, n, "ebv", (0.05, 1.0), (0.01, 0.05))
    df.loc[[3, 160], "ebv"] = np.nan  # in two chunks
    df.loc[250, "distance"] = -5.0
    df.to_parquet(tmp_path / "ebv.parquet")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ts = read_tracers(tmp_path / "ebv.parquet")
        m = build_from_parquet(tmp_path / "ebv.parquet", chunk_size=100, quiet=True, **PARAMS)
    save_model(m, tmp_path / "model.fits")
    got = load_model(tmp_path / "model.fits").tracers_.meta
    assert got["rejected_by_reason"] == ts.meta["rejected_by_reason"] == m.build_info_["rejected_by_reason"]
    assert sum(got["rejected_by_reason"].values()) == 3
    masked = lambda texts: {re.sub(r"\d[\d.]*", "#", a) for a in texts}  # a chunk's median is its own
    assert masked(got["assumptions"]) == masked(ts.meta["assumptions"])
    assert any("E(B-V)" in a for a in got["assumptions"]) and "A_V taken as given" not in got["assumptions"]
    assert got["columns"] == ts.meta["columns"] and got["columns"]["ebv"] == "ebv"
    assert (got["duplicates"], got["n_merged"], got["n_input"]) == ("merge", 0, n)


def test_each_assumption_said_once_however_many_chunks(tmp_path):
    # a bare distance column is assumed in pc once per catalogue (read_tracers says it once); each chunk
    # states it with its own median, and those must not become one line per chunk in build_info_ and the
    # model file's record (a catalogue of 10^8 rows in 100 chunks would list it 100 times)
    n = 400
    df = _invented_frame(9, n, "av", (0.1, 3.0), (0.02, 0.2))
    df.to_parquet(tmp_path / "bare.parquet")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ts = read_tracers(tmp_path / "bare.parquet")
        m = build_from_parquet(tmp_path / "bare.parquet", chunk_size=50, quiet=True, **PARAMS)
    said = m.build_info_["assumptions"]
    assert len(said) == len(ts.meta["assumptions"])
    assert sum("has no unit" in a for a in said) == 1
    assert m.tracers_.meta["assumptions"] == said


def test_catalogue_folder_leaves_out_hidden_and_underscore_files(tmp_path):
    # common practice (pyarrow.dataset's ignore_prefixes, Spark, dask): in a folder of Parquet parts, files and
    # folders starting with '.' or '_' are not parts of the table: an unfinished write's _temporary/ copy, or the
    # '._' metadata files macOS leaves on other disks (not Parquet at all). Both reads must see the 300 rows once.
    rng = np.random.default_rng(10)
    n = 300
    df = pd.DataFrame({"l": rng.uniform(20, 60, n), "b": rng.uniform(-5, 5, n),
                       "distance": rng.uniform(200, 3000, n), "distance_err": rng.uniform(20, 200, n),
                       "av": rng.uniform(0.1, 3.0, n), "av_err": rng.uniform(0.02, 0.2, n)})
    folder = tmp_path / "catalogue"
    (folder / "_temporary" / "0").mkdir(parents=True)
    df.iloc[:150].to_parquet(folder / "part-0.parquet")
    df.iloc[150:].to_parquet(folder / "part-1.parquet")
    df.iloc[150:].to_parquet(folder / "_temporary" / "0" / "part-1.parquet")
    (folder / "._part-0.parquet").write_bytes(b"\x00\x05\x16\x07" + bytes(60))  # AppleDouble header, not Parquet
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ts = read_tracers(folder)
        m = build_from_parquet(folder, chunk_size=100, quiet=True, **PARAMS)
    assert len(ts) == n and ts.meta["n_input"] == n
    assert (m.build_info_["n_rows"], m.build_info_["n_used"], m.build_info_["n_merged"]) == (n, n, 0)
    assert [Path(f).name for f in m.build_info_["files"]] == ["part-0.parquet", "part-1.parquet"]


def test_disagreeing_group_split_across_chunks_is_scaled_as_in_memory(tmp_path):
    # one invented cluster ('Harrow 4') listed three times under its name, 2-3 arcmin apart: twice in chunk 0
    # (merged there) and once in chunk 1, plus an exact copy of its first row in chunk 2. The three distinct
    # E(B-V) values 0.50, 0.62, 0.44 +- 0.03 disagree: the merged error is scaled by S = sqrt(chi2 / (N - 1))
    # (Particle Data Group averaging procedure, from memory), with chi2 and N = 3 of all three measurements
    # (the copy counts once) however the rows fall into chunks: the chunked read equals the in-memory one
    n = 300
    df = _invented_frame(12, n, "ebv", (0.05, 1.0), (0.02, 0.05))
    df.insert(0, "name", [f"F{i}" for i in range(n)])
    for row, dl, ebv, dist in ((10, 0.0, 0.50, 1500.0), (11, 2.0, 0.62, 1620.0), (150, 3.0, 0.44, 1400.0)):
        df.loc[row, ["name", "l", "b", "ebv", "ebv_err", "distance", "distance_err"]] = [
            "Harrow 4", 35.0 + dl / 60.0, 1.0, ebv, 0.03, dist, 60.0]
    df.loc[250] = df.loc[10]
    df.to_parquet(tmp_path / "split.parquet", row_group_size=64)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        ts = read_tracers(tmp_path / "split.parquet", distance_unit="pc")
        m = build_from_parquet(tmp_path / "split.parquet", chunk_size=100, quiet=True, distance_unit="pc", **PARAMS)
    said = [str(w.message) for w in record if "scaled up" in str(w.message)]
    w = np.full(3, 1 / 0.03**2)
    x = np.array([0.50, 0.62, 0.44])
    mean = np.sum(w * x) / w.sum()
    s = np.sqrt(np.sum(w * (x - mean) ** 2) / (3 - 1))
    at = int(np.flatnonzero(np.asarray(ts.name) == "Harrow 4")[0])
    assert s > 1 and ts.excess_err[at] == pytest.approx(s * w.sum() ** -0.5, rel=1e-12)
    assert ts.av_err[at] == pytest.approx(3.1 * s * w.sum() ** -0.5, rel=1e-12)
    info = m.build_info_
    assert info["n_used"] == len(ts) == n - 3 and info["n_merged"] == ts.meta["n_merged"] == 3
    assert info["n_scaled_groups"] == ts.meta["n_scaled_groups"] == 1
    assert m.tracers_.meta["n_scaled_groups"] == 1  # the record a model file keeps
    # said by both reads, with the largest factor
    assert len(said) == 2 and all(f"largest {max(s, 1):.3g}" in t for t in said)
    # every tracer the same, the scaled one too (matched by distance; the model's errors floored as every fit
    # floors them)
    a, c = np.argsort(np.asarray(m.tracers_.distance)), np.argsort(np.asarray(ts.distance))
    de, ae = floor_errors(np.asarray(ts.distance), np.asarray(ts.distance_err), np.asarray(ts.av_err), warn=False)
    memory = {"distance": ts.distance, "distance_err": de, "av": ts.av, "av_err": ae, "l": ts.l, "b": ts.b}
    for k, v in memory.items():
        np.testing.assert_allclose(np.asarray(getattr(m.tracers_, k))[a], np.asarray(v, float)[c], rtol=1e-10,
                                   err_msg=k)
    assert np.asarray(m.tracers_.av_err)[a][np.argsort(c)][at] == pytest.approx(ts.av_err[at], rel=1e-10)
