"""Tests for dustkit.answers: estimate_targets keeps every input row, and answers equal the model's own."""

import warnings

import numpy as np
import pytest
from astropy import units as u
from astropy.table import Table

import dustkit
from dustkit import CAUTION, ExtinctionModel, read_targets
from dustkit.answers import estimate_targets
from dustkit.exceptions import RowsRejectedWarning
from dustkit.simulate import Cloud, DustField, simulate_tracers
from dustkit.tracers import read_tracers

# an invented field (simulated here; no real data): a layer and one cloud
FIELD = DustField(a0=1.0, h=120.0, z_sun=20.0, clouds=(Cloud(40.0, 0.0, 800.0, 3.0, 40.0, 1.0),))


@pytest.fixture(scope="module")
def model():
    t = simulate_tracers(FIELD, 400, l_range=(20, 60), b_range=(-8, 8), distance_max=3000, rng=4)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tracers = read_tracers(t)
    return ExtinctionModel(nside=8, distance_max=3000 * u.pc, distance_step=300 * u.pc, quiet=True).fit(tracers)


def _mag(column):
    """A table column in mag (a Table keeps the unit on the column)."""
    return column.quantity.to_value(u.mag)


def _targets():
    # rows 1 (no distance) and 3 (|b| > 90) cannot be placed; 'av' clashes with an output column
    return Table({
        "name": ["T1", "T2", "T3", "T4", "T5"],
        "l": [30.0, 35.0, 40.0, 45.0, 50.0] * u.deg,
        "b": [1.0, -2.0, 0.5, 95.0, -1.0] * u.deg,
        "distance": [500.0, np.nan, 1200.0, 900.0, 2500.0] * u.pc,
        "av": [9.0, 9.0, 9.0, 9.0, 9.0],
        "priority": [1, 2, 3, 4, 5],
    })


def test_estimate_targets_keeps_every_row_and_column(model):
    with pytest.warns(RowsRejectedWarning, match="2 of 5"):  # the rows kept empty are announced
        out = estimate_targets(model, _targets(), bands=("Ks",))
    assert len(out) == 5 and list(out["name"]) == ["T1", "T2", "T3", "T4", "T5"]  # order kept
    assert list(out["priority"]) == [1, 2, 3, 4, 5]
    assert "input_av" in out.colnames and np.all(out["input_av"] == 9.0)  # clashing input renamed
    av = _mag(out["av"])
    assert np.isnan(av[[1, 3]]).all() and np.isfinite(av[[0, 2, 4]]).all()
    assert np.isnan(_mag(out["a_Ks"])[[1, 3]]).all()
    assert out.meta["caution"] == CAUTION
    assert out.meta["n_estimated"] == 3 and sum(out.meta["rejected_by_reason"].values()) == 2


def test_estimates_equal_the_models_own_answers(model):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        targets = read_targets(_targets())
    out = estimate_targets(model, targets)
    ok = np.asarray(targets.valid)
    a, e = model.av(targets.l[ok] * u.deg, targets.b[ok] * u.deg, targets.distance[ok] * u.pc,
                    distance_err=targets.distance_err[ok] * u.pc)
    np.testing.assert_array_equal(_mag(out["av"])[ok], a.to_value(u.mag))
    np.testing.assert_array_equal(_mag(out["av_err"])[ok], e.to_value(u.mag))


def test_answers_work_for_any_model_with_the_answer_interface(model):
    # a second model class answers through the same functions when it has av_pc and friends
    class Shifted:
        grid_, law, rv, tracers_ = model.grid_, model.law, model.rv, None

        def check_fitted(self):
            pass

        def av_pc(self, l, b, d, distance_err=None):
            a, e = model.av_pc(l, b, d, distance_err)
            return a + 0.1, e

        def layer_av_pc(self, l, b, d):
            return model.layer_av_pc(l, b, d)

        def grid_pixel_radius(self):
            return model.grid_pixel_radius()

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = estimate_targets(Shifted(), _targets())
        ref = estimate_targets(model, _targets())
    np.testing.assert_allclose(_mag(out["av"])[[0, 2, 4]], _mag(ref["av"])[[0, 2, 4]] + 0.1)
    from dustkit.answers import profile_table

    p = profile_table(Shifted(), 40 * u.deg, 0 * u.deg)
    assert np.all(np.diff(p["av"].to_value(u.mag)) >= 0)  # cumulative extinction never decreases


def test_estimate_targets_refuses_reading_options_with_a_target_list(model):
    from dustkit import ParameterError

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        targets = read_targets(_targets())
    with pytest.raises(ParameterError, match="distance_unit"):
        estimate_targets(model, targets, distance_unit="kpc")


def test_query_band_temperature_as_quantity_is_not_called_unitless(model):
    # query(..., temperature=5000 * u.K) warned "temperature='array' has no unit; assuming kelvin":
    # the unit was stripped before the band conversion. The answer must equal the band conversion of
    # the same A_V for that star, and say nothing about a missing unit.
    from dustkit.bands import av_to_band
    from dustkit.exceptions import AssumptionWarning

    with warnings.catch_warnings():
        warnings.simplefilter("error", AssumptionWarning)
        t = model.query([30.0, 45.0] * u.deg, [1.0, -2.0] * u.deg, [800.0, 2000.0] * u.pc, bands=("Ks",),
                        temperature=5000 * u.K)
        ak, _ = av_to_band(t["av"], t["av_err"], "Ks", law=model.law, rv=model.rv, temperature=5000 * u.K)
    np.testing.assert_allclose(t["a_Ks"].to_value(u.mag), u.Quantity(ak, u.mag).value, rtol=1e-12)
    # A_Ks/A_V about 0.11-0.12 for CCM89 at R_V = 3.1 (CCM89 Table 3 at 2.2 micron: 0.114, from memory)
    assert np.all(np.abs(t["a_Ks"].to_value(u.mag) / t["av"].to_value(u.mag) - 0.115) < 0.01)


def test_estimate_targets_band_extinction_is_for_each_targets_own_star(model):
    # A broad band's A/A_V depends on the star: Gaia collaboration (Babusiaux et al. 2018, A&A 616, A10;
    # from memory) give k_G = A_G/A_0 about 0.96 for (BP-RP)_0 = 0 and 0.67 for (BP-RP)_0 = 2.0 at A_0 = 0.3.
    # estimate_targets gave every target a 5800 K star's A_G, ignoring the targets' own teff column.
    from dustkit.bands import av_to_band

    t = Table({"name": ["hot", "cool", "nan"], "l": [30.0, 30.0, 30.0] * u.deg, "b": [1.0, 1.0, 1.0] * u.deg,
               "distance": [1500.0, 1500.0, 1500.0] * u.pc, "teff": [25000.0, 3500.0, np.nan]})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = estimate_targets(model, t, bands=("G",))
    av, ag = _mag(out["av"]), _mag(out["a_G"])
    k = ag / av
    assert k[0] - k[1] > 0.2  # hot star ~1.0, cool star ~0.75 (Babusiaux et al. 2018, from memory: 0.96 vs 0.67)
    for i, temp in enumerate([25000.0, 3500.0, 5800.0]):  # the empty cell: the default 5800 K star
        want, _ = av_to_band(av[i], 0.0, "G", law=model.law, rv=model.rv, temperature=temp * u.K)
        assert ag[i] == pytest.approx(float(want), rel=1e-9)
    assert "'teff'" in out.meta["band_temperature"] and "1 without a value: 5800 K" in out.meta["band_temperature"]
    # one temperature for all, or a column named explicitly, or the default said in meta
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        one = estimate_targets(model, t, bands=("G",), temperature=3500 * u.K)
        named = estimate_targets(model, t.copy(copy_data=True), bands=("G",), temperature="teff")
        t.remove_column("teff")
        plain = estimate_targets(model, t, bands=("G",))
    assert _mag(one["a_G"])[0] == pytest.approx(ag[1], rel=1e-9)
    np.testing.assert_array_equal(_mag(named["a_G"]), ag)
    assert "5800 K" in plain.meta["band_temperature"] and _mag(plain["a_G"])[0] == pytest.approx(ag[2], rel=1e-9)


def test_targets_temperature_column_is_read_as_the_tracers_one_bad_rows_named_and_counted(model):
    # estimate_targets read a target's temperature column with checks of its own: a text cell stopped
    # it, an infinite or negative one silently took a 5800 K star, and values set to the tables'
    # 2 000-100 000 K edge (the passband tables' range) were not announced. Now one reading serves
    # targets and tracers: the same rows rejected for the same reasons, named, the others counted.
    from dustkit.exceptions import AssumptionWarning
    from dustkit.tracers.reader import target_temperatures

    teff = ["25000", "hot", "inf", "-5", "", "150000", "4500"]
    n = len(teff)
    t = Table({"name": [f"t{i}" for i in range(n)], "l": np.full(n, 30.0) * u.deg, "b": np.full(n, 1.0) * u.deg,
               "distance": np.full(n, 1500.0) * u.pc, "teff": teff})
    with pytest.warns(RowsRejectedWarning, match=r"3 targets have no usable value in 'teff'.*row 1 \(t1\)"):
        with pytest.warns(AssumptionWarning, match=r"1 target has a value in 'teff' beyond the 2000-100000 K"):
            out = estimate_targets(model, t, bands=("G",))
    ag, av = _mag(out["a_G"]), _mag(out["av"])
    assert np.all(np.isfinite(av))                            # A_V is kept for every row
    assert np.array_equal(np.isnan(ag), [False, True, True, True, False, False, False])
    assert "1 without a value" in out.meta["band_temperature"] and "3 unusable" in out.meta["band_temperature"]
    assert sum(out.meta["band_temperature_rejected"].values()) == 3
    # the same column beside an E(BP-RP) rejects the same rows for the same reasons in read_tracers
    tr_table = t.copy()
    tr_table["E(BP-RP)"] = np.full(n, 0.3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tracers = read_tracers(tr_table)
        temps = target_temperatures(read_targets(t))
    assert list(tracers.rejected["row"]) == list(temps.rejected["row"]) == [1, 2, 3]
    assert list(tracers.rejected["reason"]) == list(temps.rejected["reason"])
    # log10 K by its name: values outside (0, 6) are bad rows alike; a median below 100 K stops both
    logt = Table({"l": [30.0, 31.0], "b": [1.0, 1.0], "distance": [1500.0, 1500.0], "logTeff": [3.76, 7.5]})
    read = target_temperatures(logt)
    assert np.isnan(read.values[1]) and read.values[0] == pytest.approx(10**3.76)
    assert any(c is RowsRejectedWarning and "log10 temperature in 'logTeff' outside (0, 6)" in m for c, m in read.notes)
    with pytest.raises(dustkit.CatalogError, match="median of 3.78: not a stellar temperature"):
        target_temperatures(Table({"teff": [3.76, 3.8]}))


def test_targets_intrinsic_colour_gives_their_star_as_the_tracer_reader_does(model):
    # a target list whose only star information was an intrinsic colour got a 5800 K star's band extinctions;
    # the colour is now read by the tracer reader's own code: a blackbody of the same colour, bad cells named
    from dustkit.bands import av_to_band
    from dustkit.exceptions import AssumptionWarning

    t = Table({"name": ["red", "typo", "blank"], "l": [30.0, 30.0, 30.0] * u.deg, "b": [1.0, 1.5, 2.0] * u.deg,
               "distance": [1500.0, 1500.0, 1500.0] * u.pc, "(BP-RP)_0": ["1.6", "1.2x", ""]})
    with pytest.warns(RowsRejectedWarning, match=r"1 target has no usable value in '\(BP-RP\)_0'.*row 1 \(typo\)"):
        with pytest.warns(AssumptionWarning, match=r"1 target has no value in '\(BP-RP\)_0'.*5800 K"):
            out = estimate_targets(model, t, bands=("G",))
    assert out.meta["band_temperature"].startswith("the temperatures from the intrinsic colour '(BP-RP)_0'")
    av, ag = _mag(out["av"]), _mag(out["a_G"])
    assert np.all(np.isfinite(av)) and np.isnan(ag[1]) and np.isfinite(ag[[0, 2]]).all()
    # the star the tracer reader derives from the same colour (beside an E(BP-RP), which needs it)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tracer = read_tracers(Table({"l": [30.0], "b": [1.0], "distance": [1500.0], "E(BP-RP)": [0.3],
                                     "(BP-RP)_0": [1.6]}))
    temp = float(tracer.temperature[0])
    assert 3000 < temp < 5000  # a red star: cooler than the 5800 K default
    want, _ = av_to_band(av[0], 0.0, "G", law=model.law, rv=model.rv, temperature=temp * u.K)
    assert ag[0] == pytest.approx(float(want), rel=1e-9)
    sun, _ = av_to_band(av[0], 0.0, "G", law=model.law, rv=model.rv, temperature=5800 * u.K)
    # A_G/A_V falls as the star reddens (Babusiaux et al. 2018, A&A 616, A10, from memory: k_G about 0.96 at
    # (BP-RP)_0 = 0, 0.67 at 2.0): the red target's A_G is clearly below a 5800 K star's
    assert ag[0] / av[0] < float(sun) / av[0] - 0.03
    blank, _ = av_to_band(av[2], 0.0, "G", law=model.law, rv=model.rv, temperature=5800 * u.K)
    assert ag[2] == pytest.approx(float(blank), rel=1e-9)  # an empty cell: the default star, counted
    # a temperature column, when there is one too, comes first (as in the tracer reader)
    t["teff"] = [4000.0, 4000.0, 4000.0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        both = estimate_targets(model, t, bands=("G",))
    assert "'teff'" in both.meta["band_temperature"] and np.isfinite(_mag(both["a_G"])).all()


def test_estimate_targets_refuses_an_unknown_temperature_column(model):
    from dustkit import ParameterError

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(ParameterError, match="column of the targets \\(name, l, b.*Got 'Teff_missing'"):
            estimate_targets(model, _targets(), bands=("G",), temperature="Teff_missing")
        with pytest.raises(ParameterError, match="temperature"):
            estimate_targets(model, _targets(), bands=("G",), temperature=500 * u.K)


@pytest.mark.parametrize("ask, shown", [
    (lambda m: m.av(np.array([30.0, 31.0]) * u.deg, np.array([1.0, 1.0]) * u.deg, np.array([500.0, 900.0])),
     "Got [500.0, 900.0] instead."),
    (lambda m: m.av(30 * u.deg, 1 * u.deg, np.array([500.0, 900.0]) * u.s), "Got [500.0, 900.0] s instead."),
    (lambda m: m.query(np.array([30.0, 31.0]) * u.deg, np.array([1.0, 2.0, 3.0]) * u.deg, 500 * u.pc),
     "Got l (2,), b (3,), distance () instead."),
    (lambda m: m.profile(30 * u.deg, 1 * u.deg, radius=np.array([1.0, 2.0]) * u.deg), "Got [1.0, 2.0] deg instead."),
])
def test_answers_show_bad_values_as_plain_numbers(model, ask, shown):
    # numpy's and astropy's reprs (array([500., 900.]), <Quantity [500., 900.] s>) were shown as they are
    with pytest.raises(dustkit.ParameterError) as info:
        ask(model)
    message = str(info.value)
    assert shown in message, message
    assert not any(noise in message for noise in ("array(", "np.float64", "<Quantity", "dtype")), message


def test_answers_refuse_masked_and_non_finite_positions_naming_the_index(model):
    # A masked cell of a QTable column (a MaskedQuantity) was answered at the placeholder under the mask, and a
    # NaN longitude gave a silent NaN (while a NaN latitude or distance raised): a wrong number for a position
    # nobody asked about, or a hole. Both must raise, naming the argument and the row.
    from astropy.table import MaskedColumn, QTable

    from dustkit import ParameterError

    t = QTable()
    t["l"] = MaskedColumn([30.0, 40.0, 45.0], mask=[False, True, False], unit="deg")
    t["b"] = [1.0, 1.0, -2.0] * u.deg
    t["d"] = [800.0, 1500.0, 2000.0] * u.pc
    for answer in (model.av, model.query):
        with pytest.raises(ParameterError, match=r"'l' parameter must be free of masked values.*index \[1\]"):
            answer(t["l"], t["b"], t["d"])
    # the same column with nothing masked answers as the plain one
    t["l"].mask = False
    np.testing.assert_array_equal(model.av(t["l"], t["b"], t["d"])[0],
                                  model.av([30.0, 40.0, 45.0] * u.deg, t["b"], t["d"])[0])
    with pytest.raises(ParameterError, match=r"'l' parameter must be a finite longitude.*nan\] at index \[2\]"):
        model.av([30.0, 40.0, np.nan] * u.deg, t["b"], t["d"])
    with pytest.raises(ParameterError, match=r"'l' parameter must be a finite longitude.*inf"):
        model.query(np.inf * u.deg, 1 * u.deg, 1 * u.kpc)


def test_answers_refuse_unusable_distance_errors_and_clashing_shapes(model):
    # A NaN distance error gave a NaN av_err without a word, a negative one was squared into a real error, and
    # arrays of different lengths failed with numpy's broadcasting message, naming no argument.
    from dustkit import ParameterError

    l, b, d = [30.0, 40.0] * u.deg, [1.0, -1.0] * u.deg, [800.0, 2000.0] * u.pc
    for bad, shown in ((np.nan, "nan"), (-50.0, "-50.0"), (np.inf, "inf")):
        with pytest.raises(ParameterError, match=rf"'distance_err' parameter must be finite and non-negative.*{shown}"):
            model.av(l, b, d, distance_err=[100.0, bad] * u.pc)
    with pytest.raises(ParameterError, match=r"'distance_err' parameter must be a scalar or one error per position"):
        model.query(l, b, d, distance_err=[1.0, 2.0, 3.0] * u.pc)
    with pytest.raises(ParameterError, match=r"'l, b, distance' parameter.*l \(3,\), b \(2,\)"):
        model.av([30.0, 40.0, 50.0] * u.deg, b, d)
    # an exact distance (error 0) is an answer, the same as no error given
    np.testing.assert_array_equal(model.av(l, b, d, distance_err=0 * u.pc)[1], model.av(l, b, d)[1])


def test_profile_refuses_negative_or_missing_distances_and_many_sight_lines(model):
    # profile(distances=[-1, 5] kpc) answered the binned model at -1 kpc with A_V > 0 (dust before the Sun),
    # a NaN distance crashed with an IndexError, and two longitudes a TypeError ("only 0-dimensional arrays").
    from dustkit import ParameterError

    with pytest.raises(ParameterError, match=r"'distances' parameter must be finite and non-negative.*-1000.0\] at index \[0\]"):
        model.profile(40 * u.deg, 0 * u.deg, distances=[-1.0, 2.0] * u.kpc)
    with pytest.raises(ParameterError, match=r"'distances' parameter must be finite and non-negative.*nan\] at index \[1\]"):
        model.profile(40 * u.deg, 0 * u.deg, distances=[1.0, np.nan] * u.kpc)
    with pytest.raises(ParameterError, match=r"'l' parameter must be one sky position.*query"):
        model.profile([30.0, 40.0] * u.deg, 0 * u.deg)
    # a one-element array is one sight line; l = 360 deg is l = 0 (astropy's Longitude wraps at 360 deg)
    from astropy.coordinates import Longitude

    wrapped = float(Longitude(360 * u.deg).deg)
    one = model.profile([360.0] * u.deg, [0.0] * u.deg, distances=[0.0, 1.0, 2.0] * u.kpc)
    ref = model.profile(wrapped * u.deg, 0 * u.deg, distances=[0.0, 1.0, 2.0] * u.kpc)
    np.testing.assert_array_equal(one["av"], ref["av"])
    assert one["av"][0].to_value(u.mag) == 0.0  # no dust in front of the Sun (common practice: A_V(0) = 0)


def test_query_bands_under_another_rv_say_that_av_is_held_fixed(model):
    # query(..., rv=5) converts the model's A_V (built under R_V = 3.1) to bands with the R_V = 5 curve,
    # keeping A_V: for tracers measured as E(B-V), A_V = R_V E(B-V) (the definition of R_V) would itself be
    # 5/3.1 times larger, so the band answers were 38% below the R_V = 5 model's without a word.
    from dustkit.exceptions import AssumptionWarning

    l, b, d = [30.0, 45.0] * u.deg, [1.0, -2.0] * u.deg, [800.0, 2000.0] * u.pc
    with pytest.warns(AssumptionWarning, match=r"held fixed.*with_law"):
        t = model.query(l, b, d, bands=("Ks",), rv=5.0)
    assert "with_law" in t.meta["band_law"]
    with warnings.catch_warnings():
        warnings.simplefilter("error", AssumptionWarning)  # the model's own law and R_V: nothing to say
        same = model.query(l, b, d, bands=("Ks",), rv=model.rv, law=model.law)
    assert "band_law" not in same.meta
