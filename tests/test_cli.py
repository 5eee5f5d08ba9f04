"""The ``dustkit`` command, run as a subprocess on small invented catalogues.

The command is a thin layer over the library, so its answers are checked against the
Python API on the same inputs (bit for bit where the file format keeps every digit). Error
behaviour follows common practice for command-line tools: one line on stderr, exit status 2
for a bad command line or option value, 1 for a failed job, no traceback without --debug.
"""

import argparse
import json
import os
import subprocess
import sys
import warnings
from pathlib import Path

import healpy as hp
import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord
from astropy.table import QTable, Table

from dustkit.cli import main
from dustkit.io import load_model
from dustkit.density import DensityModel, catalogue_lift, fit_catalogue_layer
from dustkit._errors import AssumptionWarning
from dustkit.model import CAUTION, ExtinctionModel
from dustkit.simulate import Cloud, DustField, simulate_tracers
from dustkit.tracers import read_tracers

# an invented field for these tests
FIELD = DustField(a0=0.9, h=110.0, z_sun=15.0, clouds=(Cloud(200.0, 2.0, 800.0, 3.0, 40.0, 1.0),))
BUILD_OPTS = ["--nside", "16", "--distance-max", "4000", "--distance-step", "250", "--distance-unit", "kpc"]
COMMANDS = ("build", "estimate", "layer", "profile", "export", "laws", "bands", "demo")


def run(*args, cwd=None, check_rc=None):
    """Run ``python -m dustkit.cli ARGS`` in a new process; return (returncode, stdout, stderr)."""
    env = dict(os.environ, PYTHONWARNINGS="ignore::DeprecationWarning")
    p = subprocess.run([sys.executable, "-m", "dustkit.cli", *map(str, args)], capture_output=True, text=True,
                       cwd=cwd, env=env, timeout=120)
    if check_rc is not None:
        assert p.returncode == check_rc, (p.returncode, p.stdout, p.stderr)
    return p.returncode, p.stdout, p.stderr


@pytest.fixture
def call(capsys, monkeypatch):
    """Run ``dustkit.cli.main(ARGS)`` in this process (the same code without the start-up time).

    Returns a function like :func:`run`. The process-level behaviour (entry point, exit status
    of the interpreter) is covered by the tests that use :func:`run`.
    """

    def _call(*args, cwd=None, check_rc=None):
        if cwd is not None:
            monkeypatch.chdir(cwd)
        capsys.readouterr()
        rc = main([str(a) for a in args])
        out, err = capsys.readouterr()
        if check_rc is not None:
            assert rc == check_rc, (rc, out, err)
        return rc, out, err

    return _call


def one_line_error(stderr):
    lines = [s for s in stderr.splitlines() if s.strip() and not s.startswith("warning:")]
    assert len(lines) == 1, stderr
    assert "Traceback" not in stderr
    return lines[0]


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """A small tracer catalogue (unit-less distances in kpc, one bad row) and a target list."""
    d = tmp_path_factory.mktemp("cli")
    sim = simulate_tracers(FIELD, 250, l_range=(180, 220), b_range=(-8, 8), distance_max=4000, rng=7,
                           name_prefix="Testfield")
    cat = Table()
    cat["name"] = sim["name"]
    cat["glon"] = np.asarray(sim["l"])
    cat["glat"] = np.asarray(sim["b"])
    cat["dist"] = np.asarray(sim["distance"]) / 1000.0  # kpc, no unit in the file
    cat["e_dist"] = np.asarray(sim["distance_err"]) / 1000.0
    cat["ebv"] = np.asarray(sim["ebv"])
    cat["e_ebv"] = np.asarray(sim["ebv_err"])
    cat["glat"][10] = 97.0  # a typo: |b| > 90
    cat.write(d / "cat.csv", format="ascii.csv")

    rng = np.random.default_rng(3)
    n = 12
    c = SkyCoord(l=rng.uniform(185, 215, n) * u.deg, b=rng.uniform(-5, 5, n) * u.deg, frame="galactic").icrs
    tg = Table()
    tg["target"] = [f"T{i:02d}" for i in range(n)]
    tg["ra"] = c.ra.deg
    tg["dec"] = c.dec.deg
    tg["dist_kpc"] = np.round(rng.uniform(0.3, 3.5, n), 3)
    tg["dist_kpc"][4] = np.nan  # no distance: kept, with empty extinction
    tg["note"] = ["keep me"] * n
    tg.write(d / "targets.csv", format="ascii.csv")
    return d


@pytest.fixture(scope="module")
def built(files):
    rc, out, err = run("build", files / "cat.csv", "-o", files / "model.fits", *BUILD_OPTS)
    assert rc == 0, err
    return files / "model.fits", out, err


def _api_tracers(files):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return read_tracers(files / "cat.csv", distance_unit="kpc")


def test_build_prints_the_job_and_writes_a_model(built, files):
    path, out, err = built
    assert "249 tracers" in out and "1 rejected" in out
    assert "'glat' outside [-90, 90] deg" in out  # rejected rows by reason
    assert "a0" in out and "mag/kpc" in out and "z_sun" in out
    assert f"Wrote the model to {path}" in out
    assert CAUTION in out
    assert "warning: 1 of 250 rows rejected" in err
    # the command is the library: the same model as the Python API builds, answer for answer
    api = ExtinctionModel(nside=16, distance_max=4000 * u.pc, distance_step=250 * u.pc, quiet=True).fit(_api_tracers(files))
    cli = load_model(path)
    rng = np.random.default_rng(1)
    l, b, d = rng.uniform(180, 220, 500) * u.deg, rng.uniform(-8, 8, 500) * u.deg, rng.uniform(0, 5000, 500) * u.pc
    assert np.array_equal(api.av(l, b, d)[0], cli.av(l, b, d)[0])
    assert np.array_equal(api.av(l, b, d)[1], cli.av(l, b, d)[1])


def test_build_with_edges_law_and_column_mapping(files, tmp_path, call):
    out_path = tmp_path / "m2.fits"
    rc, out, err = call("--quiet", "build", files / "cat.csv", "-o", out_path, "--nside", "8",
                       "--distance-edges", "0,500,1000,2000,4000", "--law", "odonnell94", "--rv", "3.1",
                       "--column", "ebv=ebv", "--column", "distance=dist", "--distance-unit", "kpc")
    assert rc == 0, err
    assert out == ""  # --quiet
    m = load_model(out_path)
    assert np.array_equal(m.grid_.distance_edges, [0, 500, 1000, 2000, 4000])
    assert m.law == "odonnell94" and m.grid_.nside == 8


def test_build_takes_a_layer_written_by_the_layer_command(files, tmp_path, call):
    # a layer fitted to one catalogue (dustkit layer --json) serves the model of another: the
    # model's layer is the file's (not refitted), and the report says so
    rc, out, err = call("layer", files / "cat.csv", "--json", "--distance-unit", "kpc")
    assert rc == 0, err
    given = json.loads(out)
    given["a0"] = 0.8  # not what this catalogue would give
    (tmp_path / "layer.json").write_text(json.dumps(given))
    rc, out, err = call("build", files / "cat.csv", "-o", tmp_path / "m.fits", "--layer-from", tmp_path / "layer.json",
                        *BUILD_OPTS)
    assert rc == 0, err
    assert "given in" in out and "not fitted" in out
    m = load_model(tmp_path / "m.fits")
    assert m.layer_.a0 == 0.8 and m.layer_.a0_err == given["a0_err"] and m.layer_.h == given["h"]
    assert m.layer is not None  # the binned model (these options) keeps that its layer was given
    # a file that is not a layer: one line naming the option and the missing key, nothing written
    (tmp_path / "bad.json").write_text(json.dumps({"a0": 1.0, "h": 100.0}))
    rc, out, err = call("build", files / "cat.csv", "-o", tmp_path / "m2.fits", "--layer-from", tmp_path / "bad.json",
                        *BUILD_OPTS)
    assert rc == 2 and "z_sun" in one_line_error(err) and not (tmp_path / "m2.fits").exists()
    (tmp_path / "bad2.json").write_text("a0 = 1")
    rc, out, err = call("build", files / "cat.csv", "-o", tmp_path / "m2.fits", "--layer-from", tmp_path / "bad2.json",
                        *BUILD_OPTS)
    assert rc == 2 and "--layer-from" in one_line_error(err) and "dustkit layer" in err


def test_build_refuses_to_overwrite(built, files, call):
    path = built[0]
    before = path.read_bytes()
    rc, out, err = call("build", files / "cat.csv", "-o", path, *BUILD_OPTS)
    assert rc == 1
    assert "already exists" in one_line_error(err) and "--overwrite" in err
    assert path.read_bytes() == before


def test_build_and_layer_write_the_rejected_rows(files, tmp_path, call):
    # the rejected rows could be seen only from Python (TracerSet.rejected); the command printed counts by reason
    want = _api_tracers(files).rejected
    rejects = tmp_path / "rejects.csv"
    rc, out, err = call("build", files / "cat.csv", "-o", tmp_path / "m.fits", "--distance-unit", "kpc",
                        "--model", "binned", "--nside", "8", "--rejects", rejects, check_rc=0)
    assert f"Wrote the 1 rejected row of {files / 'cat.csv'} to {rejects}" in out
    got = Table.read(rejects, format="ascii.csv")
    assert got.colnames == ["row", "name", "reason", "column", "value"] == want.colnames
    assert list(got["row"]) == list(want["row"]) == [10]  # the row with |b| > 90 (fixture)
    assert list(got["reason"]) == list(want["reason"]) and got["column"][0] == "glat" and float(got["value"][0]) == 97
    # an existing file is kept (status 1) unless --overwrite; with it, replaced
    rejects.write_text("an older file\n")
    rc, out, err = call("layer", files / "cat.csv", "--distance-unit", "kpc", "--rejects", rejects)
    assert rc == 1 and "--overwrite" in one_line_error(err) and rejects.read_text() == "an older file\n"
    rc, out, err = call("layer", files / "cat.csv", "--distance-unit", "kpc", "--json", "--rejects", rejects,
                        "--overwrite", check_rc=0)
    assert json.loads(out)["a0"] > 0  # stdout keeps the JSON alone; the file is said on stderr
    assert f"to {rejects}" in err and list(Table.read(rejects, format="ascii.csv")["row"]) == [10]
    # no rejected row: an empty table with the same columns, and the command says so
    cat = Table.read(files / "cat.csv", format="ascii.csv")
    cat.remove_row(10)
    cat.write(tmp_path / "clean.csv", format="ascii.csv")
    rc, out, err = call("layer", tmp_path / "clean.csv", "--distance-unit", "kpc", "--rejects", tmp_path / "none.ecsv",
                        check_rc=0)
    assert "No row of" in out and "was rejected: wrote an empty table" in out
    empty = Table.read(tmp_path / "none.ecsv")
    assert len(empty) == 0 and empty.colnames == want.colnames


@pytest.mark.parametrize("opts, expect", [
    (["--chunk-size", "100", "--rejects", "r.csv"], "Hint: add --in-memory"),  # the out-of-core build keeps no rows
    (["--rejects", "m.fits"], "-o and --rejects name the same file"),
    (["--rejects", "cat.csv", "--overwrite"], "--rejects names the catalogue being read"),
    (["--rejects", "r.txt"], "--rejects r.txt: no table format has the suffix '.txt'"),
])
def test_build_refuses_a_rejects_file_it_cannot_write_as_asked(files, tmp_path, call, opts, expect):
    # refused before anything is read or written: a bad command line (status 2)
    (tmp_path / "cat.csv").write_bytes((files / "cat.csv").read_bytes())
    before = sorted(tmp_path.iterdir())
    rc, out, err = call("build", "cat.csv", "-o", "m.fits", "--distance-unit", "kpc", *opts, cwd=tmp_path)
    assert rc == 2 and expect in one_line_error(err), err
    assert sorted(tmp_path.iterdir()) == before and out == ""


def test_a_grid_too_large_names_the_options_that_size_it(files, tmp_path, call):
    # the library says 'grid', nside= and distance_step=; the user typed --nside and --distance-step
    rc, out, err = call("build", files / "cat.csv", "-o", tmp_path / "m.fits", "--nside", "1024",
                        "--distance-step", "1", "--distance-unit", "kpc")
    line = one_line_error(err)
    assert rc == 2 and line.startswith("dustkit build: error: The grid (options --nside, --distance-max, "
                                       "--distance-step and --distance-edges) must be small enough"), line
    assert "Hint: lower --nside or use fewer distance bins (a larger --distance-step, a smaller --distance-max" in line
    assert "'grid' parameter" not in line and "nside=" not in line and "distance_step" not in line
    assert "TracerSet" not in out  # refused before the catalogue is read
    assert list(tmp_path.iterdir()) == []


def test_estimate_band_extinction_for_targets_with_an_intrinsic_colour(built, files, tmp_path, call):
    # the targets' only star information is an intrinsic colour: their band extinctions are for a blackbody
    # of that colour (as the tracer reader does), announced, and a bad cell is named by its row
    from dustkit.tracers.reader import target_temperatures

    tg = Table.read(files / "targets.csv", format="ascii.csv")
    tg["bp_rp0"] = ["1.40"] * len(tg)
    tg["bp_rp0"][2] = "1.4x"
    tg.write(tmp_path / "tg.csv", format="ascii.csv")
    rc, out, err = call("estimate", built[0], tmp_path / "tg.csv", "-o", tmp_path / "out.csv", "--band", "G",
                        "--distance-unit", "kpc", check_rc=0)
    assert "are for the temperatures from the intrinsic colour 'bp_rp0'" in err
    assert "no usable value in 'bp_rp0'" in err and "row 2 (T02)" in err and "add --temperature" in err
    res = Table.read(tmp_path / "out.csv", format="ascii.csv")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        temps = target_temperatures(tg)
    assert temps.values[0] < 5000  # a red star
    a_g = np.asarray(res["a_G"], float)
    assert np.isnan(a_g[2]) and np.isnan(a_g[4])  # the bad cell; the row without a distance
    from dustkit.bands import av_to_band

    model = load_model(built[0])
    want, _ = av_to_band(float(res["av"][0]), 0.0, "G", law=model.law, rv=model.rv, temperature=temps.values[0] * u.K)
    assert a_g[0] == pytest.approx(float(want), rel=1e-6)  # CSV keeps about 16 digits


def test_estimate_keeps_input_columns_and_matches_the_api(built, files, tmp_path):
    out_path = tmp_path / "est.csv"
    rc, out, err = run("estimate", built[0], files / "targets.csv", "-o", out_path, "--band", "J", "--band", "Ks")
    assert rc == 0, err
    assert "11 of 12 targets" in out and CAUTION in out
    assert "1 of 12 targets have no usable position or distance" in err and "T04" in err
    res = Table.read(out_path, format="ascii.csv")
    assert res.colnames == ["target", "ra", "dec", "dist_kpc", "note",
                            "av", "av_err", "a_J", "a_J_err", "a_Ks", "a_Ks_err"]
    src = Table.read(files / "targets.csv", format="ascii.csv")
    assert list(res["target"]) == list(src["target"]) and list(res["note"]) == ["keep me"] * 12
    assert np.array_equal(res["ra"], src["ra"])
    bad = res["target"] == "T04"
    assert np.all(np.isnan(np.asarray(res["av"], float)[bad]))
    ok = ~bad
    # the same answers from the Python API (ICRS -> Galactic with astropy; distances in kpc)
    model = load_model(built[0])
    c = SkyCoord(ra=np.asarray(src["ra"])[ok] * u.deg, dec=np.asarray(src["dec"])[ok] * u.deg).galactic
    q = model.query(c.l, c.b, np.asarray(src["dist_kpc"])[ok] * u.kpc, bands=("J", "Ks"))
    for col in ("av", "av_err", "a_J", "a_J_err", "a_Ks", "a_Ks_err"):
        assert np.allclose(np.asarray(res[col], float)[ok], q[col].to_value(u.mag), rtol=1e-12, atol=0), col
    # A_Ks / A_V for CCM89 at R_V 3.1 is about 0.11-0.12 (CCM89 Table 3 gives 0.114 at K);
    # the Ks passband coefficient falls very slightly as A_V grows (computed: 5e-4 relative)
    ratio = np.asarray(res["a_Ks"], float)[ok] / np.asarray(res["av"], float)[ok]
    assert np.allclose(ratio, ratio[0], rtol=1e-3) and 0.10 < ratio[0] < 0.125


def test_estimate_with_a_density_model_says_how_each_answer_is_supported(built, files, tmp_path, call):
    # a 3-D density model's estimates carry support, n_tracers, prior_only and, with --samples N,
    # N draws as columns av_samples_1 .. av_samples_N in CSV: the same numbers as the Python API
    from dustkit.answers import estimate_targets

    path = tmp_path / "dens.fits"
    call("--quiet", "build", files / "cat.csv", "-o", path, "--model", "density", "--distance-unit", "kpc", check_rc=0)
    out_path = tmp_path / "est.csv"
    rc, out, err = call("estimate", path, files / "targets.csv", "-o", out_path, "--samples", "5", check_rc=0)
    res = Table.read(out_path, format="ascii.csv")
    assert res.colnames[5:] == ["av", "av_err", "av_err_layer", "support", "n_tracers", "prior_only",
                                *[f"av_samples_{j}" for j in range(1, 6)]]
    assert "support, n_tracers, prior_only" in out
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        want = estimate_targets(load_model(path), files / "targets.csv", samples=5)
    ok = ~np.isnan(np.asarray(want["av"], float))
    for col in ("av", "av_err", "support", "n_tracers"):
        assert np.allclose(np.asarray(res[col], float)[ok], np.asarray(want[col], float)[ok], rtol=1e-12), col
    assert np.allclose(np.stack([np.asarray(res[f"av_samples_{j}"], float) for j in range(1, 6)], axis=1)[ok],
                       want["av_samples"].quantity.to_value(u.mag)[ok], rtol=1e-12)
    n_prior = int(np.sum(np.asarray(want["prior_only"].filled(False))))
    assert (f"{n_prior} of {int(ok.sum())} targets are answered by the prior alone" in err) == (n_prior > 0)
    # a binned model keeps no posterior draws: one line naming the option, nothing written
    rc, out, err = call("estimate", built[0], files / "targets.csv", "-o", tmp_path / "x.csv", "--samples", "5")
    assert rc == 2 and "samples" in one_line_error(err) and not (tmp_path / "x.csv").exists()


def test_estimate_says_which_targets_lie_beyond_the_models_last_edge(built, files, tmp_path, call):
    # no tracer informs an answer past the grid's last edge (the layer carried on): the command
    # counts such targets, and the Python table says how many in its meta
    from dustkit.answers import estimate_targets

    last = load_model(built[0]).grid_.distance_edges[-1]
    tg = Table({"name": ["Near One", "Far One", "Far Two"], "l": [200.0, 200.0, 205.0], "b": [1.0, 1.0, -2.0],
                "distance": [1000.0, 3 * last, 5 * last]})
    tg.write(tmp_path / "far.csv", format="ascii.csv")
    rc, out, err = call("estimate", built[0], tmp_path / "far.csv", "-o", tmp_path / "far_out.csv", check_rc=0)
    assert f"2 of 3 targets lie beyond the model's last distance edge ({last:g} pc)" in err
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = estimate_targets(load_model(built[0]), tmp_path / "far.csv")
    assert res.meta["n_beyond_grid"] == 2
    rc, out, err = call("estimate", built[0], files / "targets.csv", "-o", tmp_path / "near_out.csv", check_rc=0)
    assert "beyond the model's last distance edge" not in err


def test_estimate_takes_a_parallax_zero_point(built, tmp_path, call):
    # a parallax zero point is subtracted before d = 1000 / parallax (the convention of Lindegren
    # et al. 2021, A&A 649, A4, for Gaia EDR3): a -0.02 mas zero point makes a 0.5 mas parallax
    # 0.52 mas, i.e. 1923 pc instead of 2000 pc, as the Python reader gives it
    tg = Table({"name": ["Star One", "Star Two"], "l": [200.0, 205.0], "b": [1.0, -2.0],
                "parallax": [0.5, 1.0] * u.mas, "parallax_error": [0.02, 0.02] * u.mas})
    tg.write(tmp_path / "plx.ecsv")
    call("estimate", built[0], tmp_path / "plx.ecsv", "-o", tmp_path / "plain.ecsv", check_rc=0)
    call("estimate", built[0], tmp_path / "plx.ecsv", "-o", tmp_path / "zp.ecsv", "--parallax-zero-point", "-0.02",
         check_rc=0)
    plain, zp = QTable.read(tmp_path / "plain.ecsv"), QTable.read(tmp_path / "zp.ecsv")
    from dustkit.answers import estimate_targets
    from dustkit.tracers import read_targets

    model = load_model(built[0])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        targets = read_targets(tmp_path / "plx.ecsv", parallax_zero_point=-0.02 * u.mas)
        want = estimate_targets(model, targets)
    np.testing.assert_allclose(np.asarray(targets.distance), [1000 / 0.52, 1000 / 1.02], rtol=1e-9)
    np.testing.assert_allclose(zp["av"].to_value(u.mag), u.Quantity(want["av"]).to_value(u.mag), rtol=1e-12)
    assert np.all(zp["av"] < plain["av"])  # nearer targets, less extinction


def test_estimate_ecsv_output_keeps_units(built, files, tmp_path, call):
    out_path = tmp_path / "est.ecsv"
    call("--quiet", "estimate", built[0], files / "targets.csv", "-o", out_path, check_rc=0)
    res = QTable.read(out_path)
    assert res["av"].unit == u.mag and res["av_err"].unit == u.mag
    assert "statistical" in res.meta["caution"]


def test_estimate_output_fed_back_as_targets_keeps_every_earlier_column(built, files, tmp_path, call):
    # a target list that went through an estimate before (with a model of last year, say) holds 'av' and, the
    # second time, 'input_av' too: a third estimate must keep both earlier answers under names of their own
    # instead of stopping, and answer as the first did (same model, same targets)
    paths = [files / "targets.csv"] + [tmp_path / f"round{k}.ecsv" for k in (1, 2, 3)]
    for src, dst in zip(paths[:-1], paths[1:]):
        call("--quiet", "estimate", built[0], src, "-o", dst, check_rc=0)
    first, third = QTable.read(paths[1]), QTable.read(paths[3])
    assert third.colnames[:5] == ["target", "ra", "dec", "dist_kpc", "note"]
    assert {"input_av", "input_av_2", "input_av_err", "input_av_err_2", "av", "av_err"} <= set(third.colnames)
    ok = np.isfinite(first["av"].to_value(u.mag))
    for col in ("input_av", "input_av_2", "av"):
        np.testing.assert_array_equal(third[col].to_value(u.mag)[ok], first["av"].to_value(u.mag)[ok])


def test_csv_draws_fed_back_with_draws_keep_both_sets(files, tmp_path, call):
    # draws go to CSV as av_samples_1 .. av_samples_N; estimating such a file again with --samples used to write
    # the new draws over the old columns of the same names, one set silently lost. Both sets are kept, the old
    # ones under input_av_samples_<j>, each equal to what the first run wrote
    path = tmp_path / "dens.fits"
    call("--quiet", "build", files / "cat.csv", "-o", path, "--model", "density", "--distance-unit", "kpc", check_rc=0)
    call("--quiet", "estimate", path, files / "targets.csv", "-o", tmp_path / "one.csv", "--samples", "3", check_rc=0)
    call("--quiet", "estimate", path, tmp_path / "one.csv", "-o", tmp_path / "two.csv", "--samples", "3", check_rc=0)
    one, two = Table.read(tmp_path / "one.csv"), Table.read(tmp_path / "two.csv")
    assert len(two.colnames) == len(set(two.colnames)) == len(one.colnames) + 9  # av, av_err, ..., 3 draws again
    for j in (1, 2, 3):
        np.testing.assert_array_equal(two[f"input_av_samples_{j}"], one[f"av_samples_{j}"])
        assert np.isfinite(np.asarray(two[f"av_samples_{j}"], float)).sum() == 11  # the 11 placed targets
    # a table whose columns would clash in CSV is refused, naming them, and nothing is written
    from dustkit.io import write_table

    clash = Table({"x": np.zeros((2, 2)), "x_1": [1.0, 2.0]})
    with pytest.raises(Exception, match=r"'x'.*x_1 \.\. x_2.*'x_1' already.*ECSV or FITS"):
        write_table(clash, tmp_path / "clash.csv")
    assert not (tmp_path / "clash.csv").exists()


def test_layer_json_has_the_keys_and_the_api_values(files):
    rc, out, err = run("layer", files / "cat.csv", "--json", "--distance-unit", "kpc")
    assert rc == 0, err
    got = json.loads(out)
    assert list(got) == ["a0", "a0_err", "h", "h_err", "z_sun", "z_sun_err"]
    want = fit_catalogue_layer(_api_tracers(files)).as_dict()  # what the command fits
    assert got == {k: float(v) for k, v in want.items()}
    # the layer the density model fits to the same catalogue: one given back with --layer-from
    # changes nothing
    model = DensityModel(quiet=True, amplitudes=(0.25,), lengths=[500] * u.pc).fit(_api_tracers(files))
    fitted = model.layer_
    assert [fitted.a0, fitted.h, fitted.z_sun] == [got["a0"], got["h"], got["z_sun"]]
    # and the command's lift caution is judged as the build's (the same tracers above and below it)
    assert catalogue_lift(_api_tracers(files), fitted) == model.build_report_["layer_lift"]
    # a sanity check on the invented field: mid-plane extinction near the 0.9 mag/kpc put in
    assert 0.6 < got["a0"] < 1.3


def test_layer_text(files, call):
    rc, out, err = call("layer", files / "cat.csv", "--distance-unit", "kpc")
    assert rc == 0, err
    assert "a0" in out and "mag/kpc" in out and "h " in out and "z_sun" in out and "pc" in out
    # the demo field has clouds: the user is told how much of the error is their pull
    pull = fit_catalogue_layer(_api_tracers(files)).pull
    assert ("pull of dust above the layer" in out) == bool(any(pull))
    if any(pull):
        assert f"a0 {abs(pull[0]):.3f} mag/kpc" in out


def test_export_table_and_maps(built, tmp_path, call):
    rc, out, err = call("export", built[0], "-o", tmp_path / "t.ecsv", "--maps", tmp_path / "maps.fits")
    assert rc == 0, err
    model = load_model(built[0])
    t = QTable.read(tmp_path / "t.ecsv")
    want = model.to_table()
    for c in want.colnames:
        assert np.array_equal(t[c], want[c]), c
    m, h = hp.read_map(tmp_path / "maps.fits", field=5, h=True)
    h = dict(h)
    assert (h["NSIDE"], h["ORDERING"], h["COORDSYS"]) == (16, "RING", "G")
    pix = model.informed_pixels()
    assert np.array_equal(m[pix], model.av_[pix, 5])
    rc, out, err = call("export", built[0], "-o", tmp_path / "t.csv")
    assert rc == 0 and Table.read(tmp_path / "t.csv", format="ascii.csv").colnames == want.colnames
    rc, out, err = call("export", built[0], "-o", tmp_path / "t.xlsx")
    assert rc == 2 and "suffix" in one_line_error(err)


def test_profile_writes_a_figure(built, tmp_path, call):
    rc, out, err = call("profile", built[0], "--l", "200", "--b", "2", "--radius", "1.5", "-o", tmp_path / "p.png")
    assert rc == 0, err
    assert (tmp_path / "p.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
    assert "A_V toward l = 200 deg" in out


def test_laws_and_bands(call):
    rc, out, err = call("laws", check_rc=0)
    assert "ccm89" in out and "Cardelli" in out and "ApJ 345, 245" in out  # CCM89 reference
    rc, out, err = call("bands", check_rc=0)
    assert "Ks" in out and "micron" in out


@pytest.mark.parametrize("command", COMMANDS)
def test_help_on_every_command_has_an_example(command, call):
    rc, out, err = call(command, "--help")
    assert rc == 0 and "example" in out and f"dustkit {command}" in out


def test_python_m_dustkit_and_version():
    p = subprocess.run([sys.executable, "-m", "dustkit", "--version"], capture_output=True, text=True, timeout=60)
    assert p.returncode == 0 and p.stdout.startswith("dustkit ")


_BAD = {
    # the three the issue names, each in a new process: bad NSIDE, missing column, unreadable file
    "bad_nside": (["build", "{cat}", "-o", "m.fits", "--nside", "12"], 2,
                  "The --nside option must be a power of two between 1 and 1024. Got 12 instead."),
    "missing_column": (["build", "{cat}", "-o", "m.fits", "--column", "ebv=no_such_column"], 1, "no_such_column"),
    "unreadable_file": (["build", "{garbage}", "-o", "m.fits"], 1, "Could not read catalogue file"),
    # more, in this process
    "bad_column_key": (["build", "{cat}", "-o", "m.fits", "--column", "colour=x"], 2, "--column key must be one of"),
    "no_file": (["build", "{dir}/missing.csv", "-o", "m.fits"], 1, "does not exist"),
    "no_output": (["build", "{cat}"], 2, "required: -o/--output"),
    "edges_and_max": (["build", "{cat}", "-o", "m.fits", "--distance-edges", "0,100", "--distance-max", "500"], 2,
                      "not both"),
    "bad_edges": (["build", "{cat}", "-o", "m.fits", "--distance-edges", "0,1k"], 2, "--distance-edges takes"),
    "bad_law": (["build", "{cat}", "-o", "m.fits", "--law", "nope"], 2, "The --law option must be one of"),
    "csv_as_model": (["estimate", "{cat}", "{targets}", "-o", "x.csv"], 1, "not a readable dustkit model file"),
    "bad_band": (["estimate", "{model}", "{targets}", "-o", "x.csv", "--band", "Q9"], 2, "The --band option"),
    "bad_latitude": (["profile", "{model}", "--l", "10", "--b", "95", "-o", "p.png"], 2, "The --b option"),
    "no_command": (["nosuchcommand"], 2, "invalid choice"),
}
_IN_NEW_PROCESS = ("bad_nside", "missing_column", "unreadable_file")


@pytest.mark.parametrize("case", list(_BAD))
def test_bad_input_gives_one_line_and_a_status(case, files, built, tmp_path, call):
    args, status, expect = _BAD[case]
    (tmp_path / "garbage.csv").write_bytes(b"\x00\xff\x13 not a table \x00" * 50)
    fill = {"cat": files / "cat.csv", "targets": files / "targets.csv", "model": built[0],
            "garbage": tmp_path / "garbage.csv", "dir": tmp_path}
    runner = run if case in _IN_NEW_PROCESS else call
    rc, out, err = runner(*[a.format(**fill) for a in args], cwd=tmp_path)
    assert rc == status, (rc, err)
    line = one_line_error(err)
    assert line.startswith("dustkit") and ": error: " in line
    assert expect in line
    assert not (tmp_path / "m.fits").exists()


def test_debug_shows_the_traceback(tmp_path, call):
    rc, out, err = call("--debug", "build", tmp_path / "missing.csv", "-o", tmp_path / "m.fits")
    assert rc == 1 and "Traceback" in err and "does not exist" in err


def test_demo_runs_the_whole_job(tmp_path):
    out_dir = tmp_path / "demo"
    rc, out, err = run("demo", "--out", out_dir, cwd=tmp_path)
    assert rc == 0, err
    for name in ("veyra_model.fits", "veyra_table.ecsv", "veyra_table.csv", "veyra_slices.fits",
                 "veyra_targets_av.csv", "profile_long_shadow.png", "profile_veyra_veil.png"):
        assert (out_dir / name).stat().st_size > 0, name
    assert "invented" in out
    assert "4 rejected" in out and "'GLAT' outside [-90, 90] deg" in out and "non-numeric value" in out
    assert str(out_dir / "veyra_model.fits") in out
    assert CAUTION in out
    est = Table.read(out_dir / "veyra_targets_av.csv", format="ascii.csv")
    assert len(est) == 20 and int(np.isnan(np.asarray(est["av"], float)).sum()) == 1
    m = load_model(out_dir / "veyra_model.fits")
    assert m.grid_.nside == 32 and len(m.tracers_) == 396
    # the grid the demo says it builds is the one in the file (5 kpc is the demo's choice, not the default)
    assert "out to 5 kpc" in out and m.grid_.distance_edges[-1] == 5000
    default_max = DensityModel().get_params()["distance_max"].to_value("kpc")
    assert f"out to 5 kpc, about as far as the clusters reach, instead of the default {default_max:g} kpc" in out
    # step 5: the dust features of the model, the strongest invented cloud among them: the Long Shadow
    # (truth of the invented field, data_demo/veyra_field.json: 1.6 kpc), located within 15%
    feats = Table.read(out_dir / "veyra_features.csv", format="ascii.csv")
    assert "5. Finding dust features" in out and "(invented Long Shadow: 1600 pc" in out
    located = feats[feats["kind"] == "located"]
    sep = np.hypot(np.asarray(located["l"]) - 58.0, np.asarray(located["b"]) - 1.0)
    assert sep.min() < 2.0 and abs(float(located["distance"][np.argmin(sep)]) - 1600.0) <= 240.0
    # step 7: main-sequence fits of the invented member photometry, a tracer table read_tracers takes
    fits = Table.read(out_dir / "veyra_member_fits.ecsv")
    assert len(fits) == 6 and "Veyra Lantern" in out and "(truth" in out
    with pytest.warns(AssumptionWarning, match="Several distance columns"):  # distance_pc and mu0: not an error
        assert len(read_tracers(out_dir / "veyra_member_fits.ecsv").l) == 6


def test_every_help_example_is_a_valid_command_line():
    import shlex

    from dustkit.bands import get_band
    from dustkit.cli import _EPILOGS, build_parser
    from dustkit.laws import get_law

    parser = build_parser()
    examples = [line.strip() for text in _EPILOGS.values() for line in text.splitlines()
                if line.strip().startswith("dustkit ")]
    assert len(examples) >= len(COMMANDS)
    for line in examples:
        words = shlex.split(line.split(">")[0])[1:]
        args = parser.parse_args(words)
        if getattr(args, "law", None):
            get_law(args.law)
        for band in getattr(args, "band", []) or []:
            get_band(band)


def test_features_command_writes_the_table_the_api_gives(built, tmp_path, call):
    from dustkit.features import detect_features

    out_csv = tmp_path / "features.csv"
    rc, out, err = call("features", built[0], "-o", out_csv, "--seed", "0")
    assert rc == 0, err
    got = Table.read(out_csv, format="ascii.csv")
    want = detect_features(load_model(built[0]), random_state=0, quiet=True)
    assert len(got) == len(want)
    assert {"l", "b", "extent", "distance", "distance_err", "delta_av", "delta_av_err", "n_tracers"} <= set(got.colnames)
    # refuses to overwrite unless asked
    rc, out, err = call("features", built[0], "-o", out_csv)
    assert rc == 1 and "overwrite" in one_line_error(err)


def test_build_from_a_parquet_folder_in_chunks(tmp_path, call):
    # a folder of Parquet files goes through the out-of-core (dask) build
    sim = simulate_tracers(FIELD, 3000, l_range=(180, 220), b_range=(-8, 8), distance_max=4000, rng=9)
    folder = tmp_path / "stars"
    folder.mkdir()
    cols = {"l": sim["l"], "b": sim["b"], "distance": sim["distance"], "distance_err": sim["distance_err"],
            "av": 3.1 * np.asarray(sim["ebv"]), "av_err": 3.1 * np.asarray(sim["ebv_err"])}
    t = Table({k: np.asarray(v, float) for k, v in cols.items()})
    t[:1500].write(folder / "part0.parquet")
    t[1500:].write(folder / "part1.parquet")
    rc, out, err = call("build", folder, "-o", tmp_path / "m.fits", "--nside", "16", "--chunk-size", "1000")
    assert rc == 0, err
    assert "in 4 chunks" in out and "3000 tracers used" in out
    model = load_model(tmp_path / "m.fits")
    assert model.uncertainty_scheme_ == "bin-scatter" and model.grid_.nside == 16
    rc, out, err = call("build", folder, "-o", tmp_path / "m2.fits", "--chunk-size", "0")
    assert rc == 2 and "--chunk-size" in one_line_error(err)
    # the same build on a dask cluster (local, on 127.0.0.1) gives the same model
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        rc, out, err = call("build", folder, "-o", tmp_path / "m3.fits", "--nside", "16", "--chunk-size", "1000",
                            "--scheduler", cluster.scheduler_address)
    assert rc == 0, err
    assert "dask scheduler" in out
    assert np.allclose(load_model(tmp_path / "m3.fits").av_, model.av_, rtol=1e-9, atol=1e-12)


def test_source_temperature_option_reaches_the_reading(files, tmp_path, call):
    # an E(BP-RP) catalogue without a temperature column: --source-temperature sets the star
    # used to convert it to A_V; without it the 5800 K default is announced, once
    from dustkit.bands import av_to_excess

    cat = Table.read(files / "cat.csv", format="ascii.csv")
    ebprp, _ = av_to_excess(3.1 * np.asarray(cat["ebv"]), None, "BP", "RP")
    cat["E(BP-RP)"] = ebprp
    cat.remove_columns(["ebv", "e_ebv"])
    path = tmp_path / "bprp.csv"
    cat.write(path, format="ascii.csv")
    rc, out, err = call("layer", path, "--json", "--distance-unit", "kpc", "--source-temperature", "4000",
                        check_rc=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        want = fit_catalogue_layer(read_tracers(path, distance_unit="kpc", source_temperature=4000 * u.K)).as_dict()
        default = fit_catalogue_layer(read_tracers(path, distance_unit="kpc")).as_dict()
    assert json.loads(out) == {k: float(v) for k, v in want.items()}
    assert want["a0"] > default["a0"]  # cooler stars redden less in BP-RP: more A_V for the same E(BP-RP)
    assert "No temperature" not in err
    rc, out, err = call("layer", path, "--json", "--distance-unit", "kpc", check_rc=0)
    assert err.count("No temperature or intrinsic-colour column") == 1 and "--source-temperature" in err


def test_density_build_says_when_a_subset_chose_the_hyperparameters(files, tmp_path, call, monkeypatch):
    # a catalogue larger than CV_TRACERS: the report must say the search saw only part of it
    import dustkit.density.estimator as est

    monkeypatch.setattr(est, "CV_TRACERS", 100)
    rc, out, err = call("build", files / "cat.csv", "-o", tmp_path / "m.fits", "--model", "density",
                        "--distance-unit", "kpc", check_rc=0)
    assert "3-D log-normal density" in out
    assert "learned on a random 100 of the 249 tracers" in out
    # and how much of the clouds' pull on the layer its tracers show is left (the errors carry it)
    share = load_model(tmp_path / "m.fits").pull_left_
    assert 0.0 <= share <= 1.0 and f"{share:.2f} of the clouds' pull on the layer left in the answers' errors" in out


def test_features_help_states_the_finder_defaults(call):
    # the command passes no value of its own when an option is not given: the finder's
    # defaults rule, and the help must name the same ones
    from dustkit.features import FALSE_RATE, MIN_CONTRAST, MIN_PROBABILITY

    rc, out, err = call("features", "--help")
    text = " ".join(out.split())
    assert f"at least {MIN_PROBABILITY:g}; see" in text
    assert f"(default {FALSE_RATE:g}); 'off'" in text
    assert f"(default {MIN_CONTRAST:g})" in text


def test_column_name_empty_reads_the_catalogue_without_names():
    # `--column name=` is the command line's columns={'name': None}: a catalogue whose name column reuses IDs of
    # two invented surveys is read without names; an empty column for any other key is still refused
    from dustkit.cli import _UsageError, _columns

    assert _columns(["name=", "ebv=EBV"]) == {"name": None, "ebv": "EBV"}
    with pytest.raises(_UsageError, match="--column takes KEY=NAME"):
        _columns(["ebv="])


def test_estimate_band_extinction_for_the_targets_star(built, files, tmp_path, call):
    # --band G was always for a 5800 K star. A hot star's A_G/A_V is larger than a Sun-like one's
    # (Babusiaux et al. 2018, A&A 616, A10, from memory: k_G 0.96 at (BP-RP)_0 = 0 against 0.83 at 0.82).
    plain, hot = tmp_path / "plain.csv", tmp_path / "hot.csv"
    rc, out, err = call("estimate", built[0], files / "targets.csv", "-o", plain, "--band", "G", check_rc=0)
    assert "5800 K blackbody for every target" in err and "--temperature" in err
    rc, out, err = call("estimate", built[0], files / "targets.csv", "-o", hot, "--band", "G",
                        "--temperature", "20000", check_rc=0)
    assert "20000 K blackbody" in err
    k_plain, k_hot = (np.asarray(Table.read(p, format="ascii.csv")["a_G"], float) for p in (plain, hot))
    av = np.asarray(Table.read(plain, format="ascii.csv")["av"], float)
    ok = np.isfinite(av) & (av > 0)
    assert np.all(k_hot[ok] / av[ok] - k_plain[ok] / av[ok] > 0.08)
    rc, out, err = call("estimate", built[0], files / "targets.csv", "-o", tmp_path / "x.csv", "--band", "G",
                        "--temperature", "no_such_column")
    assert rc != 0 and "no_such_column" in one_line_error(err)


def test_export_refuses_one_file_for_table_and_maps(built, tmp_path, call):
    # with --overwrite the maps used to replace the table just written (both reported as written): the user
    # would lose the table without a word. The same file under two spellings is refused before anything is written
    out = tmp_path / "both.fits"
    rc, _, err = call("export", built[0], "-o", out, "--maps", tmp_path / "." / "both.fits", "--overwrite")
    assert rc == 2 and "same file" in one_line_error(err)
    assert not out.exists()


def test_build_refuses_a_table_name_for_the_model_before_building(files, tmp_path, call):
    # '-o model.ecsv' would have written a FITS file named as an ECSV table after the whole build
    rc, out, err = call("build", files / "cat.csv", "-o", tmp_path / "model.ecsv", *BUILD_OPTS)
    assert rc == 2 and "model file is FITS" in one_line_error(err) and "Read " not in out
    assert list(tmp_path.iterdir()) == []


def test_export_refuses_a_table_name_for_the_maps_before_writing_anything(built, tmp_path, call):
    rc, _, err = call("export", built[0], "-o", tmp_path / "t.ecsv", "--maps", tmp_path / "maps.csv")
    assert rc == 2 and "slice-map file is FITS" in one_line_error(err)
    assert list(tmp_path.iterdir()) == []


def test_features_refuses_one_file_for_the_table_and_the_detections(built, tmp_path, call):
    # -o and --detections naming one file: the detections written second replaced the feature
    # table (with --overwrite, 'Wrote' printed twice), or, without it, the run failed after
    # writing the table with "already exists". Refused before any work, nothing written.
    target = tmp_path / "same.ecsv"
    for extra in ((), ("--overwrite",)):
        rc, out, err = call("features", built[0], "-o", target, "--detections", tmp_path / "." / "same.ecsv", *extra)
        assert rc == 2 and "--detections" in one_line_error(err) and "same file" in one_line_error(err)
        assert not target.exists()


def test_features_command_says_why_no_step_is_listed(built, tmp_path, call):
    # an empty result reads as one, with the tests no step passed, and the file has the columns
    out_ecsv = tmp_path / "none.ecsv"
    rc, out, err = call("features", built[0], "-o", out_ecsv, "--min-delta-av", "50", check_rc=0)
    first = out.splitlines()[0]
    assert first.startswith("0 dust feature(s)") and "No step passed: at least 50 mag" in first
    got = Table.read(out_ecsv)
    assert len(got) == 0 and {"l", "b", "distance", "distance_err", "delta_av"} <= set(got.colnames)


def test_quiet_keeps_the_warnings(files, tmp_path, call):
    # --quiet silences progress and chatter, not warnings (its help: "print only errors and
    # warnings"): a default error assumed for every row must still be said
    cat = Table.read(files / "cat.csv", format="ascii.csv")
    cat.remove_column("e_ebv")
    cat.write(tmp_path / "no_errors.csv", format="ascii.csv")
    for args in (("--quiet", "layer"), ("layer", "--json", "--quiet")):
        rc, out, err = call(*args, tmp_path / "no_errors.csv", "--distance-unit", "kpc")
        assert rc == 0, err
        assert "warning:" in err and "No error column for the reddening" in err, err
        assert "warning: 1 of 250 rows rejected" in err


def test_layer_quiet_still_prints_the_layer(files, call):
    # --quiet drops the catalogue summary, not the command's answer (as --json is printed)
    rc, out, err = call("--quiet", "layer", files / "cat.csv", "--distance-unit", "kpc")
    assert rc == 0, err
    layer = fit_catalogue_layer(_api_tracers(files))
    assert f"a0     = {layer.a0:.3f} +- {layer.a0_err:.3f} mag/kpc" in out
    assert f"z_sun  = {layer.z_sun:.1f}" in out
    assert "TracerSet" not in out  # the summary is chatter


@pytest.mark.parametrize("mode", [(), ("--json",), ("--quiet",)])
def test_layer_says_when_clouds_lift_it_in_every_mode(files, call, monkeypatch, mode):
    # the lift caution (README: "dustkit layer ... say so") matters most with --json, whose layer a
    # later build takes with --layer-from; the judgement itself is tested in test_density.py
    import dustkit.density

    monkeypatch.setattr(dustkit.density, "catalogue_lift", lambda tracers, layer: {"above": 0.2, "below": 0.05,
                                                                                    "lifted": True})
    rc, out, err = call("layer", files / "cat.csv", "--distance-unit", "kpc", *mode)
    assert rc == 0, err
    assert "warning: 20% of the tracers lie more than 2 sigma above the fitted layer" in err
    if mode == ("--json",):
        assert set(json.loads(out)) == {"a0", "a0_err", "h", "h_err", "z_sun", "z_sun_err"}


def test_output_piped_into_a_reader_that_stops_is_not_an_error():
    # 'dustkit laws | head -3': the reader closes the pipe early; common practice is to stop
    # quietly (no error line, the status a shell gives a command stopped by SIGPIPE: 141)
    env = dict(os.environ, PYTHONWARNINGS="ignore::DeprecationWarning")
    for args in (["laws"], ["bands"]):
        p = subprocess.Popen([sys.executable, "-m", "dustkit.cli", *args], stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, env=env)
        p.stdout.close()  # before the command has written anything
        err = p.stderr.read().decode()
        p.stderr.close()
        assert p.wait(timeout=120) == 141, err
        assert "error" not in err.lower() and "Traceback" not in err, err


def test_features_refuses_the_other_finders_options(built, files, tmp_path, call):
    # an option the chosen finder does not use was accepted and ignored: a user asking for
    # --min-significance 50 on a density model got the density finder's cut without a word
    rc, out, err = call("features", built[0], "-o", tmp_path / "f.csv", "--min-probability", "0.5",
                        "--min-contrast", "2")  # built[0] is a binned model: the steps finder
    assert rc == 2 and "--min-probability, --min-contrast apply to the density finder" in one_line_error(err)
    assert not (tmp_path / "f.csv").exists()
    path = tmp_path / "density.fits"
    call("--quiet", "build", files / "cat.csv", "-o", path, "--model", "density", "--distance-unit", "kpc",
         "--nside", "8", check_rc=0)
    for opt in (["--min-significance", "50"], ["--seed", "3"]):
        rc, out, err = call("features", path, "-o", tmp_path / "f.csv", *opt)
        assert rc == 2 and f"{opt[0]} applies to --finder steps" in one_line_error(err)
        assert not (tmp_path / "f.csv").exists()
    rc, out, err = call("features", path, "-o", tmp_path / "f.csv", "--finder", "steps", "--seed", "3",
                        "--min-significance", "50")
    assert rc == 0, err
    assert (tmp_path / "f.csv").exists()


@pytest.mark.parametrize("opts, expect", [
    (["--model", "density", "--uncertainty", "monte-carlo"], "--uncertainty monte-carlo applies to the binned model"),
    (["--in-memory", "--chunk-size", "100"], "--in-memory reads the whole catalogue"),
    (["--chunk-size", "100", "--source-temperature", "4500"], "--source-temperature applies to the in-memory build"),
])
def test_build_refuses_options_its_build_would_ignore(files, tmp_path, call, opts, expect):
    # each of these was accepted and silently ignored (the model written without it)
    rc, out, err = call("build", files / "cat.csv", "-o", tmp_path / "m.fits", "--distance-unit", "kpc",
                        "--nside", "8", *opts)
    assert rc == 2 and expect in one_line_error(err)
    assert not (tmp_path / "m.fits").exists()


def test_fit_clusters_json_of_a_cluster_that_cannot_be_fitted(tmp_path, call):
    # invented members (dustkit.clusters.simulate is not needed: two stars are too few for any fit)
    members = Table({"cluster": ["Testfield A"] * 2, "l": [10.0, 10.01], "b": [1.0, 1.01],
                     "B": [12.0, 12.5], "e_B": [0.01, 0.01], "V": [11.5, 11.9], "e_V": [0.01, 0.01]})
    members.write(tmp_path / "two.csv", format="ascii.csv")
    rc, out, err = call("fit-clusters", tmp_path / "two.csv", "-o", tmp_path / "two.ecsv", "--json")
    # a failed job (status 1), not a bad command line (2); no JSON on stdout, no table left behind
    assert rc == 1, err
    line = one_line_error(err)
    assert "Testfield A could not be fitted" in line and "at least" in line
    assert out == "" and not (tmp_path / "two.ecsv").exists()


def test_fit_clusters_refuses_an_output_suffix_before_fitting(tmp_path, call, monkeypatch):
    import dustkit.clusters

    def no_fit(*a, **k):
        raise AssertionError("fitted before the output name was checked")

    monkeypatch.setattr(dustkit.clusters, "fit_clusters", no_fit)
    Table({"cluster": ["Testfield A"], "V": [11.0]}).write(tmp_path / "m.csv", format="ascii.csv")
    rc, out, err = call("fit-clusters", tmp_path / "m.csv", "-o", tmp_path / "out.txt")
    assert rc == 2 and "suffix '.txt'" in one_line_error(err)


@pytest.mark.parametrize("opt", ["--duplicate-separation", "--parallax-floor"])
def test_bad_value_is_shown_as_typed_not_as_a_numpy_repr(files, tmp_path, call, opt):
    rc, out, err = call("layer", files / "cat.csv", "--distance-unit", "kpc", opt, "-1")
    line = one_line_error(err)
    assert rc == 2 and "Got -1.0 instead." in line and "np.float64" not in line


def test_readme_command_line_section_lists_every_command_as_it_parses():
    # README's "## Command line" block is what a user copies: each line must parse, and every
    # command the parser has must be shown there
    import re
    import shlex

    from dustkit.cli import build_parser

    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text()
    section = readme.split("## Command line", 1)[1].split("\n## ", 1)[0]
    block = re.search(r"```\n(.*?)```", section, re.S).group(1)
    parser = build_parser()
    shown = set()
    for line in block.splitlines():
        if line.strip().startswith("dustkit "):
            args = parser.parse_args(shlex.split(line.split(">")[0])[1:])
            shown.add(args.command)
    subparsers = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    assert shown == set(subparsers.choices)


# an error from the library names the option the user typed, not the Python parameter behind it
_NAMED = {
    "parallax_floor": (["layer", "{cat}", "--distance-unit", "kpc", "--parallax-floor", "-1"],
                       "The --parallax-floor option must be", "parallax_err_floor"),
    "duplicate_separation": (["layer", "{cat}", "--distance-unit", "kpc", "--duplicate-separation", "-1"],
                             "The --duplicate-separation option must be", "duplicate_separation"),
    "bands_temperature": (["bands", "--temperature", "0"], "The --temperature option must be", "'temperature'"),
    "distance_max": (["build", "{cat}", "-o", "{dir}/m.fits", "--distance-max", "-5"],
                     "The --distance-max option must be", "distance_max"),
    "samples": (["estimate", "{model}", "{targets}", "-o", "{dir}/x.csv", "--samples", "-3"],
                "The --samples option must be", "'samples'"),
    "law": (["layer", "{cat}", "--law", "nope"], "'dustkit laws' shows", "list_laws()"),
}


@pytest.mark.parametrize("case", list(_NAMED))
def test_errors_name_the_option_not_the_python_parameter(case, files, built, tmp_path, call):
    args, expect, python_name = _NAMED[case]
    fill = {"cat": files / "cat.csv", "targets": files / "targets.csv", "model": built[0], "dir": tmp_path}
    rc, out, err = call(*[a.format(**fill) for a in args])
    line = one_line_error(err)
    assert rc == 2 and expect in line and python_name not in line, line


def test_warnings_and_hints_name_the_options(files, tmp_path, call):
    # the catalogue's distances are unit-less kpc: the error tells a shell user the option, not the keyword
    rc, out, err = call("layer", files / "cat.csv")
    assert rc == 1 and "add --distance-unit kpc" in one_line_error(err) and "distance_unit=" not in err
    # in pc, unit-less: read as pc, and the read's summary saying so names the option too
    cat = Table.read(files / "cat.csv", format="ascii.csv")
    cat["dist"] *= 1000.0
    cat["e_dist"] *= 1000.0
    cat.write(tmp_path / "pc.csv", format="ascii.csv")
    rc, out, err = call("layer", tmp_path / "pc.csv")
    assert rc == 0 and "Add --distance-unit kpc" in out + err and "distance_unit=" not in out + err
    rc, out, err = call("layer", files / "cat.csv", "--column", "distance=nope")
    assert rc == 1 and "--column" in one_line_error(err) and "columns=" not in err
    rc, out, err = call("build", files / "cat.csv", "-o", files / "cat.csv", "--distance-unit", "kpc")
    assert rc != 0 and "overwrite=True" not in err


def test_the_translation_keeps_what_the_command_has_no_option_for():
    from dustkit.cli import _option_names, _translator, build_parser

    say = _translator(_option_names(build_parser(), "features"))
    assert say("The 'random_state' parameter must be an integer >= 0.") == "The --seed option must be an integer >= 0."
    assert say("The 'merge_sigma' parameter must be > 0.") == "The 'merge_sigma' parameter must be > 0."
    assert say("The 'model' parameter must be fitted.") == "The MODEL argument must be fitted."
    assert say("Hint: pass overwrite=True (on the command line: --overwrite).") == "Hint: add --overwrite."
    # a library name standing for several options, and a hint's bare keywords, only where the command has them
    build = _translator(_option_names(build_parser(), "build"))
    assert build("The 'grid' parameter must be small. Hint: lower nside= or a larger distance_step=.") == (
        "The grid (options --nside, --distance-max, --distance-step and --distance-edges) must be small. "
        "Hint: lower --nside or a larger --distance-step.")
    assert say("Hint: lower nside=.") == "Hint: lower nside=."  # features has no --nside
    assert build("1 row rejected. See TracerSet.rejected for the rows.") == "1 row rejected. --rejects FILE writes the rows."
    assert say("See TracerSet.rejected for the rows.") == "See TracerSet.rejected for the rows."


# Exit status (DEVELOPERS.md, "Command line"): 2 when what was typed is wrong, 1 when the job failed on the
# files. An output name whose suffix names no format is typed, so 2 for every command that writes one; a
# missing input file is not, so 1 for every command that reads one (common practice: argparse's 2 for usage).
_OUTPUT_SUFFIX = {
    "build": ["build", "{cat}", "-o", "{dir}/m.ecsv", "--distance-unit", "kpc"],
    "estimate": ["estimate", "{model}", "{targets}", "-o", "{dir}/out.txt"],
    "profile": ["profile", "{model}", "--l", "200", "--b", "1", "-o", "{dir}/out.txt"],
    "features": ["features", "{model}", "-o", "{dir}/out.txt"],
    "features_detections": ["features", "{model}", "-o", "{dir}/f.csv", "--finder", "steps",
                            "--detections", "{dir}/out.txt"],
    "export": ["export", "{model}", "-o", "{dir}/out.txt"],
    "export_maps": ["export", "{model}", "-o", "{dir}/t.csv", "--maps", "{dir}/maps.csv"],
    "fit_clusters": ["fit-clusters", "{cat}", "-o", "{dir}/out.txt"],
}


@pytest.mark.parametrize("case", list(_OUTPUT_SUFFIX))
def test_an_output_name_without_a_format_is_a_usage_error_in_every_command(case, files, built, tmp_path, call):
    fill = {"cat": files / "cat.csv", "targets": files / "targets.csv", "model": built[0], "dir": tmp_path}
    rc, out, err = call(*[a.format(**fill) for a in _OUTPUT_SUFFIX[case]])
    line = one_line_error(err)
    option = "--maps" if case == "export_maps" else "--detections" if case.endswith("detections") else "-o"
    assert rc == 2 and f"{option} " in line and "Hint:" in line, line
    assert list(tmp_path.iterdir()) == []  # refused before anything was written


_MISSING_INPUT = {
    "build": ["build", "{dir}/none.csv", "-o", "{dir}/m.fits"],
    "layer": ["layer", "{dir}/none.csv"],
    "estimate": ["estimate", "{dir}/none.fits", "{targets}", "-o", "{dir}/out.csv"],
    "profile": ["profile", "{dir}/none.fits", "--l", "200", "--b", "1", "-o", "{dir}/out.png"],
    "features": ["features", "{dir}/none.fits", "-o", "{dir}/out.csv"],
    "export": ["export", "{dir}/none.fits", "-o", "{dir}/out.csv"],
    "fit_clusters": ["fit-clusters", "{dir}/none.csv", "-o", "{dir}/out.ecsv"],
}


@pytest.mark.parametrize("case", list(_MISSING_INPUT))
def test_a_missing_input_file_is_a_failed_job_in_every_command(case, files, tmp_path, call):
    fill = {"targets": files / "targets.csv", "dir": tmp_path}
    rc, out, err = call(*[a.format(**fill) for a in _MISSING_INPUT[case]])
    line = one_line_error(err)
    assert rc == 1 and "none." in line, line


@pytest.mark.parametrize("command", ["build", "layer", "fit-clusters", "bands"])
def test_an_rv_outside_the_laws_range_is_a_usage_error(command, files, tmp_path, call):
    # ccm89 holds for R_V 2..6 (Cardelli, Clayton & Mathis 1989, from memory); R_V 0 was already status 2
    args = {"build": ["build", files / "cat.csv", "-o", tmp_path / "m.fits"], "layer": ["layer", files / "cat.csv"],
            "fit-clusters": ["fit-clusters", files / "cat.csv", "-o", tmp_path / "c.ecsv"], "bands": ["bands"]}[command]
    rc, out, err = call(*args, "--law", "ccm89", "--rv", "8")
    line = one_line_error(err)
    assert rc == 2 and "--rv 8" in line and "[2, 6]" in line, line
    assert list(tmp_path.iterdir()) == []


# values no user can mean, each refused with the option, the value and the range allowed (status 2)
_IMPOSSIBLE = {
    "min_significance": (["features", "{binned}", "-o", "{dir}/f.csv", "--min-significance", "-5"],
                         "--min-significance", "Got -5.0", ">= 0"),
    "seed": (["features", "{binned}", "-o", "{dir}/f.csv", "--seed", "-1"], "--seed", "Got -1", ">= 0"),
    "av": (["bands", "--av", "-1"], "--av", "Got -1.0", ">= 0"),
    "zero_point_nan": (["layer", "{cat}", "--distance-unit", "kpc", "--parallax-zero-point", "nan"],
                       "--parallax-zero-point", "Got nan", "[-10, 10]"),
    "zero_point_huge": (["estimate", "{model}", "{targets}", "-o", "{dir}/x.csv", "--parallax-zero-point", "1e9"],
                        "--parallax-zero-point", "Got 1000000000.0", "[-10, 10]"),
    "source_temperature": (["layer", "{cat}", "--distance-unit", "kpc", "--source-temperature", "-5"],
                           "--source-temperature", "Got -5.0", "between 2000 and 100000 K"),
    "nside": (["build", "{cat}", "-o", "{dir}/m.fits", "--nside", "24"], "--nside", "Got 24", "power of two"),
    "edges": (["build", "{cat}", "-o", "{dir}/m.fits", "--distance-edges=-100,0,100"], "--distance-edges",
              "-100.0", "non-negative"),
}


@pytest.mark.parametrize("case", list(_IMPOSSIBLE))
def test_impossible_option_values_are_refused_naming_option_value_and_range(case, files, built, tmp_path, call):
    binned = files / "binned.fits"
    if not binned.exists():
        call("build", files / "cat.csv", "-o", binned, "--model", "binned", *BUILD_OPTS, check_rc=0)
    args, option, value, allowed = _IMPOSSIBLE[case]
    fill = {"cat": files / "cat.csv", "targets": files / "targets.csv", "model": built[0], "binned": binned,
            "dir": tmp_path}
    rc, out, err = call(*[a.format(**fill) for a in args])
    line = one_line_error(err)
    assert rc == 2 and f"The {option} option must be" in line and value in line and allowed in line, line
    assert list(tmp_path.iterdir()) == []


def test_demo_takes_the_output_option_the_other_commands_spell():
    # every command that writes names its output -o/--output; the demo's folder too (--out still works)
    from dustkit.cli import build_parser

    parser = build_parser()
    for spelling in ("-o", "--output", "--out"):
        assert parser.parse_args(["demo", spelling, "somewhere"]).out == "somewhere"
