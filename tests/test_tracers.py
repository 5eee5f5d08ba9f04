"""Tests for dustkit.tracers: catalogue ingestion into validated tracer and target sets."""

import dataclasses
import hashlib
import re
import subprocess
import sys
import time
import warnings

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import Angle, SkyCoord
from astropy.table import QTable, Table, vstack
from hypothesis import given, settings
from hypothesis import strategies as st

from dustkit._errors import AssumptionWarning, CatalogError, DuplicatesWarning, ParameterError, RowsRejectedWarning
from dustkit.tracers import (
    COLUMN_KEYS,
    DEFAULT_REJECT_LIMITS,
    SUFFIX_FORMATS,
    TargetList,
    TracerSet,
    read_targets,
    read_tracers,
)

# Check values copied from the project's reference list, with their sources.
# North Galactic Pole and Galactic centre in ICRS (computed; astropy agrees to < 0.1 arcsec).
NGP_RA, NGP_DEC = 192.85948, 27.12825
GC_RA, GC_DEC = 266.40499, -28.93617
# ICRS (0, 0) -> Galactic (computed).
ORIGIN_L, ORIGIN_B = 96.33727, -60.18855
# mu0 = 5 log10(d / pc) - 5: 10 pc -> 0, 1 kpc -> 10, 2.5 kpc -> 11.98970 (computed from the formula).
MODULUS_CASES = [(0.0, 10.0), (10.0, 1000.0), (11.98970, 2500.0)]
# Gaia EDR3 parallax zero point, Lindegren et al. 2021 (A&A 649, A4).
GAIA_EDR3_ZERO_POINT = -0.017  # mas
# HEALPix (Gorski et al. 2005, ApJ 622, 759): NSIDE 64 pixel area in deg^2; whole sky 4 pi sr.
NSIDE64_PIXEL_AREA = 0.839294
FULL_SKY_DEG2 = 4 * np.pi * (180 / np.pi) ** 2


def _quiet(func, *args, **kwargs):
    """Call ``func`` with dustkit's warnings silenced (for tests about something else)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AssumptionWarning)
        warnings.simplefilter("ignore", RowsRejectedWarning)
        return func(*args, **kwargs)


def _catalogue(n=12, seed=3):
    """A small invented cluster catalogue (no real objects)."""
    rng = np.random.default_rng(seed)
    return Table(
        {
            "Cluster": [f"Invented-{i:03d}" for i in range(n)],
            "GLON": rng.uniform(0, 360, n),
            "GLAT": rng.uniform(-20, 20, n),
            "Dist": rng.uniform(200, 5000, n) * u.pc,
            "e_Dist": rng.uniform(10, 300, n) * u.pc,
            "EBV": rng.uniform(0.0, 2.0, n),
            "e_EBV": rng.uniform(0.01, 0.1, n),
        }
    )


def _angle_diff(a, b):
    return (np.asarray(a) - np.asarray(b) + 180.0) % 360.0 - 180.0


# ======================================================================================
# Coordinates
# ======================================================================================


def test_icrs_to_galactic_reference_points():
    t = Table(
        {
            "ra": [NGP_RA, GC_RA, 0.0],
            "dec": [NGP_DEC, GC_DEC, 0.0],
            "distance": [100.0, 200.0, 300.0] * u.pc,
            "ebv": [0.1, 0.2, 0.3],
            "ebv_err": [0.01, 0.01, 0.01],
            "distance_err": [1.0, 1.0, 1.0] * u.pc,
        }
    )
    ts = read_tracers(t)
    # North Galactic Pole: b = +90 (computed reference; tolerance 1e-4 deg = 0.36 arcsec)
    assert ts.b[0] == pytest.approx(90.0, abs=1e-4)
    # Galactic centre: l = b = 0 (computed reference)
    assert abs(_angle_diff(ts.l[1], 0.0)) < 1e-4
    assert ts.b[1] == pytest.approx(0.0, abs=1e-4)
    # ICRS (0, 0) -> (96.33727, -60.18855) deg (computed reference)
    assert ts.l[2] == pytest.approx(ORIGIN_L, abs=1e-4)
    assert ts.b[2] == pytest.approx(ORIGIN_B, abs=1e-4)
    assert ts.meta["columns"]["ra"] == "ra"


@pytest.mark.parametrize(
    "ra_name, dec_name",
    [("RAJ2000", "DEJ2000"), ("RA_ICRS", "DE_ICRS"), ("RAdeg", "DEdeg"), ("_RA", "_DE"), ("Ra", "Dec")],
)
def test_equatorial_spellings_recognised(ra_name, dec_name):
    # common practice: catalogue services spell ICRS columns these ways
    t = Table({ra_name: [0.0], dec_name: [0.0], "dist_pc": [100.0], "E(B-V)": [0.2]})
    ts = _quiet(read_tracers, t)
    assert ts.l[0] == pytest.approx(ORIGIN_L, abs=1e-4)  # computed reference, see above
    assert ts.meta["columns"]["ra"] == ra_name and ts.meta["columns"]["dec"] == dec_name


@pytest.mark.parametrize("l_name, b_name", [("l", "b"), ("GLON", "GLAT"), ("glon", "glat"), ("_Glon", "_Glat"), ("LII", "BII")])
def test_galactic_spellings_recognised_and_longitude_wrapped(l_name, b_name):
    t = Table({l_name: [-10.0, 370.0 - 20.0, 0.0], b_name: [5.0, -5.0, 0.0], "dist": [1.0, 2.0, 3.0] * u.kpc, "Av": [1.0, 2.0, 3.0]})
    ts = _quiet(read_tracers, t)
    # l is wrapped to [0, 360) (common practice: l = -10 deg is l = 350 deg)
    np.testing.assert_allclose(ts.l, [350.0, 350.0, 0.0])
    np.testing.assert_allclose(ts.b, [5.0, -5.0, 0.0])


def test_sexagesimal_strings_match_astropy_angles():
    # The north Galactic pole written as sexagesimal strings (computed reference values above).
    ra_s = Angle(NGP_RA, u.deg).to_string(unit=u.hourangle, sep=":", precision=3)
    dec_s = Angle(NGP_DEC, u.deg).to_string(unit=u.deg, sep=":", precision=2, alwayssign=True)
    t = Table(
        {
            "RAJ2000": [ra_s, "00 00 00.0", "18h00m00s"],
            "DEJ2000": [dec_s, "-00 30 00", "-29d00m00s"],
            "dist": [1.0, 2.0, 3.0] * u.kpc,
            "e_dist": [0.1, 0.1, 0.1] * u.kpc,
            "ebv": [0.1, 0.1, 0.1],
            "e_ebv": [0.01, 0.01, 0.01],
        }
    )
    with pytest.warns(AssumptionWarning, match="sexagesimal"):
        ts = read_tracers(t)
    assert ts.b[0] == pytest.approx(90.0, abs=1e-3)
    # the other two rows agree with astropy's own parsing of the same strings (reference library)
    from astropy.coordinates import SkyCoord

    ref = SkyCoord(["00 00 00.0", "18h00m00s"], ["-00 30 00", "-29d00m00s"], unit=(u.hourangle, u.deg)).galactic
    np.testing.assert_allclose(_angle_diff(ts.l[1:], ref.l.deg), 0.0, atol=1e-8)
    np.testing.assert_allclose(ts.b[1:], ref.b.deg, atol=1e-8)


# ======================================================================================
# Distances
# ======================================================================================


@pytest.mark.parametrize("mu, d_pc", MODULUS_CASES)
def test_distance_modulus_worked_values(mu, d_pc):
    # mu0 = 5 log10(d/pc) - 5, the definition of the distance modulus (common practice):
    # 10 pc -> 0, 1 kpc -> 10, 2.5 kpc -> 11.98970 (computed)
    t = Table({"l": [30.0], "b": [1.0], "DM": [mu], "e_DM": [0.1], "ebv": [0.3], "e_ebv": [0.02]})
    ts = read_tracers(t, distance_modulus_kind="true")
    assert ts.distance_kind == "distance modulus"
    assert ts.distance[0] == pytest.approx(d_pc, rel=2e-6)
    # sigma_d = d ln(10)/5 sigma_mu (first-order propagation, common practice)
    assert ts.distance_err[0] == pytest.approx(d_pc * np.log(10) / 5 * 0.1, rel=2e-6)


@settings(max_examples=40, deadline=None)
@given(st.floats(min_value=1.0, max_value=1.0e5))
def test_distance_modulus_round_trip(d):
    # mu0 = 5 log10(d/pc) - 5 inverted by the reader (computed)
    mu = 5 * np.log10(d) - 5
    t = Table({"l": [1.0], "b": [2.0], "mu0": [mu], "e_mu0": [0.05], "av": [1.0], "e_av": [0.1]})
    ts = read_tracers(t)
    assert ts.distance[0] == pytest.approx(d, rel=1e-10)


def _edsd_mode_kpc(plx, sig, L):
    # Bailer-Jones 2015, PASP 127, 994, eq. for the mode under the exponentially decreasing space
    # density prior: r^3 / L - 2 r^2 + (plx / sig^2) r - 1 / sig^2 = 0 (r in kpc, plx in mas);
    # the real positive root with the highest posterior, from numpy's polynomial roots
    roots = np.roots([1.0 / L, -2.0, plx / sig**2, -1.0 / sig**2])
    roots = roots[(np.abs(roots.imag) < 1e-9) & (roots.real > 0)].real

    def logpost(r):
        return 2 * np.log(r) - r / L - (plx - 1 / r) ** 2 / (2 * sig**2)

    return roots[np.argmax(logpost(roots))]


def test_parallax_prior_mode_worked_value_and_cubic():
    # Bailer-Jones 2015, PASP 127, 994: parallax 0.2 +- 0.1 mas, L = 1.35 kpc -> mode 4.11 kpc
    t = Table({"l": [10.0], "b": [0.0], "plx": [0.2] * u.mas, "e_plx": [0.1] * u.mas,
               "ebv": [0.5], "e_ebv": [0.02]})
    ts = read_tracers(t, parallax_err_floor=0 * u.mas)
    assert ts.distance[0] / 1000 == pytest.approx(4.11, abs=0.005)
    assert ts.distance[0] / 1000 == pytest.approx(_edsd_mode_kpc(0.2, 0.1, 1.35), rel=1e-9)
    # the asymmetric uncertainty: the 84th percentile lies further from the mode than the 16th
    assert ts.distance_err_high[0] > ts.distance_err_low[0] > 0
    assert ts.distance_err[0] == pytest.approx(0.5 * (ts.distance_err_low[0] + ts.distance_err_high[0]))


@settings(max_examples=40, deadline=None)
@given(st.floats(-1.0, 5.0), st.floats(0.005, 1.0), st.floats(0.3, 5.0))
def test_parallax_prior_mode_is_the_cubic_root(plx, sig, L):
    from dustkit.tracers.distances import parallax_posterior

    mode, p16, p84 = parallax_posterior([plx], [sig], L)
    assert mode[0] / 1000 == pytest.approx(_edsd_mode_kpc(plx, sig, L), rel=1e-7)
    assert p84[0] > p16[0] and p84[0] > mode[0]


def test_parallax_percentiles_match_direct_integration():
    # the 16th/84th percentiles against a fine trapezoid integration of the same posterior (computed)
    from dustkit.tracers.distances import parallax_posterior

    for plx, sig in [(0.2, 0.1), (-0.1, 0.2), (1.0, 0.3)]:
        r = np.linspace(1e-3, 60.0, 600001)
        lp = 2 * np.log(r) - r / 1.35 - (plx - 1 / r) ** 2 / (2 * sig**2)
        p = np.exp(lp - lp.max())
        cdf = np.cumsum(p)
        cdf /= cdf[-1]
        q16, q84 = np.interp([0.16, 0.84], cdf, r)
        _, p16, p84 = parallax_posterior([plx], [sig], 1.35)
        assert p16[0] / 1000 == pytest.approx(q16, rel=5e-3)
        assert p84[0] / 1000 == pytest.approx(q84, rel=5e-3)


def test_parallax_with_gaia_edr3_zero_point():
    # corrected parallax = parallax - zero point, zero point -0.017 mas (Lindegren et al. 2021, A&A 649, A4);
    # a 1% parallax: the prior-based mode is within 0.1% of 1000 / parallax pc (common practice)
    t = Table({"l": [10.0, 20.0], "b": [0.0, 1.0], "parallax": [1.983, 0.983] * u.mas,
               "parallax_error": [0.02, 0.01] * u.mas, "ebv": [0.5, 0.6], "ebv_err": [0.02, 0.02]})
    ts = read_tracers(t, parallax_zero_point=GAIA_EDR3_ZERO_POINT * u.mas)
    np.testing.assert_allclose(ts.distance, [500.0, 1000.0], rtol=1e-3)
    floor = 0.01  # the default systematic floor, mas, added in quadrature
    sig = np.hypot([0.02, 0.01], floor)
    np.testing.assert_allclose(ts.distance / 1000, [_edsd_mode_kpc(p, s, 1.35) for p, s in zip([2.0, 1.0], sig)],
                               rtol=1e-9)
    # sigma_d close to 1000 sigma_plx / plx^2 pc for precise parallaxes
    np.testing.assert_allclose(ts.distance_err, 1000 * sig / np.array([2.0, 1.0]) ** 2, rtol=0.02)
    assert ts.distance_kind == "parallax"
    assert any("zero point -0.017 mas" in a for a in ts.meta["assumptions"])
    assert any("Bailer-Jones 2015" in a and "0.01 mas" in a for a in ts.meta["assumptions"])
    ts2 = read_tracers(t, parallax_zero_point=GAIA_EDR3_ZERO_POINT)
    np.testing.assert_array_equal(ts2.distance, ts.distance)
    t["parallax"] = t["parallax"].to(u.arcsec)
    t["parallax_error"] = t["parallax_error"].to(u.arcsec)
    ts3 = read_tracers(t, parallax_zero_point=GAIA_EDR3_ZERO_POINT * u.mas)
    np.testing.assert_allclose(ts3.distance, ts.distance, rtol=1e-9)


def test_parallaxes_at_or_below_zero_get_prior_distances():
    # every parallax with an error is kept (rejecting plx <= 0 biases the far sample, Bailer-Jones 2015);
    # a parallax <= 0 without an error cannot be used and is rejected with its reason
    t = Table({"l": [1.0, 2.0, 3.0, 4.0], "b": [0.0, 0.0, 0.0, 0.0], "plx": [-0.010, -0.020, 0.0, -0.1] * u.mas,
               "e_plx": [0.05, 0.05, 0.05, np.nan] * u.mas, "ebv": [0.1] * 4, "e_ebv": [0.01] * 4})
    with pytest.warns(RowsRejectedWarning, match=r"1 of 4 rows rejected"):
        ts = _quiet_assumptions(read_tracers, t)
    assert len(ts) == 3
    # the prior's mode: the root of the cubic of Bailer-Jones 2015 (sigma with the 0.01 mas floor)
    sig = np.hypot(0.05, 0.01)
    np.testing.assert_allclose(ts.distance / 1000, [_edsd_mode_kpc(p, sig, 1.35) for p in (-0.01, -0.02, 0.0)],
                               rtol=1e-9)
    assert np.all(np.isfinite(ts.distance_err_low) & np.isfinite(ts.distance_err_high))
    assert list(ts.rejected["row"]) == [3] and "without an error" in ts.rejected["reason"][0]


def _quiet_assumptions(fn, *a, **k):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AssumptionWarning)
        return fn(*a, **k)


def test_apparent_modulus_corrected_by_av():
    # (m - M)_V = mu0 + A_V (definition of the apparent modulus, common practice); A_V = R_V E(B-V)
    # with R_V = 3.1 (Savage & Mathis 1979).
    ebv = 0.5
    av = 3.1 * ebv
    t = Table({"l": [40.0], "b": [2.0], "(m-M)V": [10.0 + av], "e_(m-M)V": [0.1], "E(B-V)": [ebv], "e_E(B-V)": [0.03]})
    ts = read_tracers(t)
    assert ts.distance_kind == "apparent V modulus"
    assert ts.av[0] == pytest.approx(av, rel=1e-12)
    assert ts.distance[0] == pytest.approx(1000.0, rel=1e-9)  # mu0 = 10 -> 1 kpc
    # errors of (m-M)_V and A_V added in quadrature
    sigma_mu = np.hypot(0.1, 3.1 * 0.03)
    assert ts.distance_err[0] == pytest.approx(1000.0 * np.log(10) / 5 * sigma_mu, rel=1e-9)
    # Under R_V = 4 A_V = 2.0, mu0 = 11.55 - 2.0 = 9.55 -> d = 10^(9.55/5 + 1) pc (computed)
    ts4 = ts.with_law("ccm89", 4.0)
    assert ts4.av[0] == pytest.approx(2.0, rel=1e-12)
    assert ts4.distance[0] == pytest.approx(10 ** (9.55 / 5 + 1), rel=1e-9)
    assert ts.distance[0] == pytest.approx(1000.0, rel=1e-9)  # the original is unchanged


def test_distance_units_from_column_name_argument_and_bare_number():
    base = {"l": [10.0, 20.0], "b": [0.0, 1.0], "ebv": [0.1, 0.2], "e_ebv": [0.01, 0.01]}
    # unit in the column name (common practice: dist_kpc)
    ts = _quiet(read_tracers, Table({**base, "dist_kpc": [1.5, 2.0], "e_dist_kpc": [0.1, 0.2]}))
    np.testing.assert_allclose(ts.distance, [1500.0, 2000.0])
    np.testing.assert_allclose(ts.distance_err, [100.0, 200.0])
    # unit from the column (QTable / file unit)
    ts = _quiet(read_tracers, QTable({**base, "Dist": [1.5, 2.0] * u.kpc}))
    np.testing.assert_allclose(ts.distance, [1500.0, 2000.0])
    # explicit argument wins over a bare number
    ts = _quiet(read_tracers, Table({**base, "Dist": [1.5, 2.0]}), distance_unit="kpc")
    np.testing.assert_allclose(ts.distance, [1500.0, 2000.0])
    ts = _quiet(read_tracers, Table({**base, "Dist": [1.5, 2.0]}), distance_unit=u.kpc)
    np.testing.assert_allclose(ts.distance, [1500.0, 2000.0])
    # bare numbers with a median below 30 are kpc read as pc: no cluster is that near (fact of the
    # trade: the nearest star clusters are a few tens of pc away) -> the read stops, naming column, median, fix
    with pytest.raises(CatalogError, match=r"'Dist'.*median value of 1\.75.*distance_unit='kpc'.*--distance-unit kpc"):
        read_tracers(Table({**base, "Dist": [1.5, 2.0], "e_Dist": [0.1, 0.1]}))
    # ... while distances that look like pc are read as pc, with the assumption said once
    with pytest.warns(AssumptionWarning) as record:
        ts = read_tracers(Table({**base, "Dist": [1500.0, 2000.0], "e_Dist": [10.0, 10.0]}))
    msgs = [str(w.message) for w in record]
    assert any("assuming the distances are in pc" in m for m in msgs)
    np.testing.assert_allclose(ts.distance, [1500.0, 2000.0])


def test_kpc_pc_round_trip_through_to_table():
    ts = _quiet(read_tracers, _catalogue())
    t = ts.to_table()
    assert t["distance"].unit == u.pc and t["l"].unit == u.deg and t["av"].unit == u.mag
    out = QTable({"name": t["name"], "l": t["l"], "b": t["b"], "dist": t["distance"].to(u.kpc),
                  "dist_err": t["distance_err"].to(u.kpc), "av": t["av"], "av_err": t["av_err"]})
    back = read_tracers(out)
    np.testing.assert_allclose(back.distance, ts.distance, rtol=1e-13)
    np.testing.assert_allclose(back.distance_err, ts.distance_err, rtol=1e-13)
    np.testing.assert_allclose(back.av, ts.av, rtol=1e-13)
    np.testing.assert_array_equal(back.name, ts.name)


def test_unit_from_ecsv_file(tmp_path):
    t = _catalogue()
    t["Dist"] = np.asarray(t["Dist"]) / 1000.0 * u.kpc
    t["e_Dist"] = np.asarray(t["e_Dist"]) / 1000.0 * u.kpc
    path = tmp_path / "clusters.ecsv"
    t.write(path)
    with warnings.catch_warnings():
        warnings.simplefilter("error", AssumptionWarning)  # no unit assumption needed
        ts = read_tracers(path)
    np.testing.assert_allclose(ts.distance, np.asarray(_catalogue()["Dist"]), rtol=1e-12)
    assert "kpc" in " ".join(ts.meta["assumptions"])


def test_reddening_and_its_error_in_millimag_are_converted(tmp_path):
    # E(B-V) and its error written in mmag (1 mmag = 0.001 mag, astropy units) were read as mag: the
    # error 30 mmag became an A_V error of 93 mag. A_V = R_V E(B-V) (definition of R_V).
    t = _catalogue()
    t["EBV"] = np.asarray(t["EBV"]) * 1000.0 * u.mmag
    t["e_EBV"] = np.asarray(t["e_EBV"]) * 1000.0 * u.mmag
    path = tmp_path / "mmag.ecsv"
    t.write(path)
    ts = _quiet(read_tracers, path, rv=3.1)
    np.testing.assert_allclose(ts.av, 3.1 * np.asarray(_catalogue()["EBV"]), rtol=1e-12)
    np.testing.assert_allclose(ts.av_err, 3.1 * np.asarray(_catalogue()["e_EBV"]), rtol=1e-12)
    # an error column without a unit beside a value in mmag is in the value's unit
    t["e_EBV"] = np.asarray(t["e_EBV"])
    ts2 = _quiet(read_tracers, t, rv=3.1)
    np.testing.assert_allclose(ts2.av_err, ts.av_err, rtol=1e-12)
    # a reddening column whose unit is not a magnitude is refused, naming it
    t["EBV"] = np.asarray(_catalogue()["EBV"]) * u.pc
    with pytest.raises(CatalogError, match=r"'EBV'.*'pc'.*not a magnitude"):
        _quiet(read_tracers, t)


def test_upper_case_unit_from_fits_file(tmp_path):
    # FITS files often carry units in upper case ('KPC'); astropy does not parse them strictly
    t = _catalogue()
    t["Dist"] = np.asarray(t["Dist"]) / 1000.0
    t["Dist"].unit = "KPC"
    t["e_Dist"] = np.asarray(t["e_Dist"]) / 1000.0
    t["e_Dist"].unit = "KPC"
    path = tmp_path / "clusters.fits"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", u.UnitsWarning)
        t.write(path)
    with warnings.catch_warnings():
        warnings.simplefilter("error", AssumptionWarning)
        ts = read_tracers(path)
    np.testing.assert_allclose(ts.distance, np.asarray(_catalogue()["Dist"]), rtol=1e-12)
    np.testing.assert_allclose(ts.distance_err, np.asarray(_catalogue()["e_Dist"]), rtol=1e-12)


def test_upper_case_units_that_mean_something_else_as_written_are_read_as_the_column_needs(tmp_path):
    # FITS headers written in upper case (common practice in older pipelines): 'PC' parses as a petacoulomb and
    # 'MAS' must be milliarcseconds; a distance column in 'PC' is parsecs, not a charge to refuse
    from astropy.io import fits

    cols = [fits.Column(name="GLON", format="D", unit="DEG", array=np.array([30.0, 40.0, 50.0])),
            fits.Column(name="GLAT", format="D", unit="DEG", array=np.array([1.0, -1.0, 2.0])),
            fits.Column(name="DIST", format="D", unit="PC", array=np.array([800.0, 1500.0, 2500.0])),
            fits.Column(name="E_DIST", format="D", unit="PC", array=np.array([80.0, 100.0, 200.0])),
            fits.Column(name="EBV", format="D", unit="MAG", array=np.array([0.2, 0.4, 0.6]))]
    path = tmp_path / "upper.fits"
    fits.BinTableHDU.from_columns(cols).writeto(path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", u.UnitsWarning)
        ts = _quiet(read_tracers, path)
    np.testing.assert_allclose(ts.distance, [800.0, 1500.0, 2500.0], rtol=1e-12)
    np.testing.assert_allclose(ts.distance_err, [80.0, 100.0, 200.0], rtol=1e-12)
    plx = [fits.Column(name="GLON", format="D", array=np.array([30.0, 40.0])),
           fits.Column(name="GLAT", format="D", array=np.array([1.0, -1.0])),
           fits.Column(name="PLX", format="D", unit="MAS", array=np.array([1.0, 0.5])),
           fits.Column(name="E_PLX", format="D", unit="MAS", array=np.array([0.001, 0.001])),
           fits.Column(name="EBV", format="D", array=np.array([0.2, 0.4]))]
    fits.BinTableHDU.from_columns(plx).writeto(tmp_path / "plx.fits")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", u.UnitsWarning)
        tp = _quiet(read_tracers, tmp_path / "plx.fits", parallax_err_floor=0.0)
    # 1 mas and 0.5 mas at 0.1-0.2% precision: 1 and 2 kpc within a fraction of a percent (d = 1 / parallax)
    np.testing.assert_allclose(tp.distance, [1000.0, 2000.0], rtol=3e-3)
    # a unit that is neither a length as written nor in lower case is still refused, naming it
    cols[2] = fits.Column(name="DIST", format="D", unit="C", array=np.array([800.0, 1500.0, 2500.0]))
    fits.BinTableHDU.from_columns(cols).writeto(tmp_path / "charge.fits")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", u.UnitsWarning)
        with pytest.raises(CatalogError, match=r"'DIST'.*unit 'C'.*not a length"):
            _quiet(read_tracers, tmp_path / "charge.fits")


def test_distance_unit_argument_and_an_error_column_with_its_own_unit():
    # a table in kpc whose error column is in pc, both with units: distance_unit='kpc' (agreeing with the distance
    # column) must not read the pc errors as kpc (they came out 1000 times too large)
    t = QTable({"l": [30.0, 40.0], "b": [1.0, -1.0], "dist": [1.0, 2.0] * u.kpc, "e_dist": [100.0, 150.0] * u.pc,
                "ebv": [0.2, 0.4]})
    ts = _quiet(read_tracers, t, distance_unit="kpc")
    np.testing.assert_allclose(ts.distance, [1000.0, 2000.0])
    np.testing.assert_allclose(ts.distance_err, [100.0, 150.0])
    # distance_unit replacing a different unit of the column says so, with both units, and takes the file's units
    # as wrong for the error column too (values 1 and 2 labelled pc but meant as kpc)
    t2 = QTable({"l": [30.0, 40.0], "b": [1.0, -1.0], "dist": [1.0, 2.0] * u.pc, "e_dist": [0.1, 0.15] * u.pc,
                 "ebv": [0.2, 0.4], "e_ebv": [0.02, 0.03]})
    with pytest.warns(AssumptionWarning, match=r"distance_unit='kpc' replaces the unit 'pc' of column 'dist'"):
        ts2 = read_tracers(t2, distance_unit="kpc")
    np.testing.assert_allclose(ts2.distance_err, [100.0, 150.0])


def test_distance_column_with_magnitude_unit_is_refused_with_hint():
    t = QTable({"l": [1.0], "b": [0.0], "dist": [10.0] * u.mag, "ebv": [0.1]})
    with pytest.raises(CatalogError, match=r"'dist'.*not a length.*distance_modulus"):
        _quiet(read_tracers, t)


# ======================================================================================
# Reddening
# ======================================================================================


def test_ebv_to_av_and_with_law_scales_by_rv_ratio():
    # A_V = R_V E(B-V) (definition of R_V; Savage & Mathis 1979; CCM89)
    t = _catalogue()
    ts = read_tracers(t)
    assert ts.excess_kind == "E(B-V)"
    np.testing.assert_allclose(ts.av, 3.1 * np.asarray(t["EBV"]), rtol=1e-12)
    np.testing.assert_allclose(ts.av_err, 3.1 * np.asarray(t["e_EBV"]), rtol=1e-12)
    np.testing.assert_array_equal(ts.excess, np.asarray(t["EBV"]))
    ts5 = ts.with_law("ccm89", 5.0)
    np.testing.assert_allclose(ts5.av / ts.av, 5.0 / 3.1, rtol=1e-12)
    np.testing.assert_allclose(ts5.av_err / ts.av_err, 5.0 / 3.1, rtol=1e-12)
    assert ts5.rv == 5.0 and ts.rv == 3.1
    np.testing.assert_array_equal(ts5.distance, ts.distance)


def test_av_input_is_kept_under_another_law():
    t = Table({"l": [1.0, 2.0], "b": [0.0, 0.0], "dist": [1.0, 2.0] * u.kpc, "A_V": [1.2, 2.5], "e_A_V": [0.1, 0.2]})
    ts = _quiet(read_tracers, t)
    assert ts.excess_kind == "A_V"
    np.testing.assert_array_equal(ts.av, [1.2, 2.5])
    ts2 = ts.with_law("odonnell94", 4.0)
    np.testing.assert_array_equal(ts2.av, ts.av)
    assert ts2.law == "odonnell94" and ts2.rv == 4.0


def test_other_colour_excess_goes_through_bands():
    bands = pytest.importorskip("dustkit.bands")
    t = Table({"l": [1.0, 2.0], "b": [0.0, 0.0], "dist": [1.0, 2.0] * u.kpc,
               "E(J-Ks)": [0.2, 0.5], "e_E(J-Ks)": [0.02, 0.03]})
    ts = _quiet(read_tracers, t)
    assert ts.excess_kind == "E(J-Ks)" and ts.excess_color == ("J", "Ks")
    av, av_err = bands.excess_to_av(np.array([0.2, 0.5]), np.array([0.02, 0.03]), "J", "Ks", law="ccm89", rv=3.1)
    np.testing.assert_allclose(ts.av, av, rtol=1e-12)
    np.testing.assert_allclose(ts.av_err, av_err, rtol=1e-12)
    # E(J-Ks)/E(B-V) = 0.48-0.53 in the literature (from memory; 0.53 CCM89 at 2MASS wavelengths, computed)
    ratio = ts.av / np.array([0.2, 0.5]) / 3.1  # = E(B-V)/E(J-Ks)
    assert np.all((1 / ratio > 0.48) & (1 / ratio < 0.535))
    # an explicit excess column with its colour given as an argument gives the same A_V
    t2 = Table({"l": [1.0, 2.0], "b": [0.0, 0.0], "dist": [1.0, 2.0] * u.kpc, "red": [0.2, 0.5], "e_red": [0.02, 0.03]})
    ts2 = _quiet(read_tracers, t2, columns={"excess": "red"}, excess_color=("J", "Ks"))
    np.testing.assert_allclose(ts2.av, ts.av, rtol=1e-12)
    ts3 = _quiet(read_tracers, t2, columns={"excess": "red", "excess_err": "e_red"}, excess_color="J-Ks")
    np.testing.assert_allclose(ts3.av_err, ts.av_err, rtol=1e-12)
    # with_law re-derives through the new law
    ts4 = ts.with_law("fitzpatrick99", 3.1)
    av4, _ = bands.excess_to_av(np.array([0.2, 0.5]), np.array([0.02, 0.03]), "J", "Ks", law="fitzpatrick99", rv=3.1)
    np.testing.assert_allclose(ts4.av, av4, rtol=1e-12)


def test_excess_without_known_colour_is_refused():
    t = Table({"l": [1.0], "b": [0.0], "dist": [1.0] * u.kpc, "red": [0.2]})
    with pytest.raises(CatalogError, match=r"'red'.*excess_color"):
        _quiet(read_tracers, t, columns={"excess": "red"})


def test_stromgren_b_minus_y_is_not_read_as_johnson_b_with_ps1_y():
    # Stromgren b-y is its own colour: A_V is about 4.3 E(b-y) (E(b-y) = 0.74 E(B-V), from memory of
    # Crawford 1975). Read as E(B - y_PS1) it gave A_V = 1.15 E(b-y), silently; it must be refused, with
    # the column named and a hint, until its bands are known.
    t = Table({"l": [30.0], "b": [1.0], "dist": [1.5] * u.kpc, "E(b-y)": [0.3]})
    with pytest.raises(CatalogError, match=r"'E\(b-y\)'.*add_band"):
        _quiet(read_tracers, t)
    # the usual lower-case spellings of one system still read (common practice)
    t2 = Table({"l": [30.0], "b": [1.0], "dist": [1.5] * u.kpc, "E(b-v)": [0.3]})
    assert _quiet(read_tracers, t2).av[0] == pytest.approx(3.1 * 0.3)  # A_V = R_V E(B-V)


def test_per_row_rv_column_is_said_not_to_be_used():
    # A column 'R_V' beside E(B-V) was ignored without a word; A_V = R_V E(B-V) (definition of R_V) with
    # the one R_V of the read, and the column is named as not used.
    t = Table({"l": [30.0, 31.0], "b": [1.0, 1.0], "dist": [1.5, 2.0] * u.kpc, "EBV": [0.5, 0.6],
               "e_EBV": [0.03, 0.03], "e_dist": [0.1, 0.1] * u.kpc, "R_V": [5.0, 4.0]})
    with pytest.warns(AssumptionWarning, match=r"'R_V'.*not used"):
        ts = read_tracers(t, rv=3.1)
    np.testing.assert_allclose(ts.av, [3.1 * 0.5, 3.1 * 0.6])
    assert any("'R_V'" in a for a in ts.meta["assumptions"])


def test_semicolon_separated_file_is_named_as_such(tmp_path):
    # a CSV written with ';' between values (common practice in locales with decimal commas) read as one
    # column 'name;l;b;dist;ebv', and the error said no position columns were found
    path = tmp_path / "semi.csv"
    path.write_text("name;l;b;dist;ebv\nA;30;1;1500;0.5\nB;31;1;1600;0.6\n")
    with pytest.raises(CatalogError, match=r"one column.*separated by ';'.*delimiter=';'"):
        _quiet(read_tracers, path)


def test_default_errors_are_documented_and_announced():
    t = Table({"l": [1.0, 2.0], "b": [0.0, 0.0], "Dist": [1000.0, 2000.0] * u.pc, "EBV": [0.1, 0.4]})
    with pytest.warns(AssumptionWarning) as record:
        ts = read_tracers(t)
    msgs = [str(w.message) for w in record]
    assert any("No error column for the distance 'Dist'" in m and "10%" in m for m in msgs)
    assert any("No error column for the reddening 'EBV'" in m and "0.05 mag" in m for m in msgs)
    np.testing.assert_allclose(ts.distance_err, [100.0, 200.0])
    np.testing.assert_allclose(ts.excess_err, [0.05, 0.05])
    np.testing.assert_allclose(ts.av_err, [3.1 * 0.05] * 2)
    # A_V input: the same default expressed in A_V (R_V x 0.05 mag)
    t2 = Table({"l": [1.0], "b": [0.0], "Dist": [1000.0] * u.pc, "e_Dist": [50.0] * u.pc, "AV": [1.0]})
    ts2 = _quiet(read_tracers, t2, default_excess_err=0.1)
    assert ts2.av_err[0] == pytest.approx(0.31)


def test_empty_or_zero_error_gets_default_and_is_counted():
    t = Table({"l": [1.0, 2.0, 3.0], "b": [0.0, 0.0, 0.0], "Dist": [1000.0, 2000.0, 500.0] * u.pc,
               "e_Dist": [0.0, np.nan, 20.0] * u.pc, "EBV": [0.1, 0.4, 0.2], "e_EBV": [0.02, 0.03, 0.04]})
    with pytest.warns(AssumptionWarning, match=r"2 rows have an empty or zero error in 'e_Dist'"):
        ts = read_tracers(t)
    np.testing.assert_allclose(ts.distance_err, [100.0, 200.0, 20.0])


# ======================================================================================
# Bad input: each rejection reason names the column and the value
# ======================================================================================


def _bad_rows_case(tmp_path):
    csv = (
        "name,l,b,dist,e_dist,ebv,e_ebv\n"
        "ok-1,10,1,1000,50,0.3,0.02\n"
        "blank-dist,10,1,,50,0.3,0.02\n"
        "nan-dist,10,1,nan,50,0.3,0.02\n"
        "text-dist,10,1,far,50,0.3,0.02\n"
        "high-b,10,95,1000,50,0.3,0.02\n"
        "neg-dist,10,1,-100,50,0.3,0.02\n"
        "zero-dist,10,1,0,50,0.3,0.02\n"
        "huge-ebv,10,1,1000,50,25,0.02\n"
        "very-neg-ebv,10,1,1000,50,-0.5,0.02\n"
        "slightly-neg-ebv,10,1,1000,50,-0.05,0.02\n"
        "neg-err,10,1,1000,-5,0.3,0.02\n"
        "ok-2,20,-2,2000,100,0.5,0.03\n"
    )
    path = tmp_path / "bad.csv"
    path.write_text(csv)
    return path


def test_every_bad_row_is_rejected_with_its_reason(tmp_path):
    path = _bad_rows_case(tmp_path)
    with pytest.warns(RowsRejectedWarning, match=r"^9 of 12 rows rejected: .*See TracerSet.rejected"):
        ts = read_tracers(path, distance_unit="pc")
    assert list(ts.name) == ["ok-1", "slightly-neg-ebv", "ok-2"]
    # negative-but-plausible reddening is noise around zero and is kept (documented)
    assert ts.excess[1] == pytest.approx(-0.05)
    rej = {r["name"]: (r["reason"], r["column"], r["value"], r["row"]) for r in ts.rejected}
    assert rej["blank-dist"][:3] == ("missing value in 'dist'", "dist", "(empty)")
    assert rej["blank-dist"][3] == 1  # 0-based input row index
    assert rej["nan-dist"][:2] == ("missing value in 'dist'", "dist")
    assert rej["text-dist"][:3] == ("non-numeric value in 'dist'", "dist", "far")
    assert rej["high-b"][:3] == ("'b' outside [-90, 90] deg", "b", "95")
    assert rej["neg-dist"][:3] == ("distance <= 0 in 'dist'", "dist", "-100")
    assert rej["zero-dist"][:3] == ("distance <= 0 in 'dist'", "dist", "0")
    assert rej["huge-ebv"][:3] == ("E(B-V) in 'ebv' outside [-0.3, 20] mag", "ebv", "25")  # issue's absurd limits
    assert rej["very-neg-ebv"][:3] == ("E(B-V) in 'ebv' outside [-0.3, 20] mag", "ebv", "-0.5")
    assert rej["neg-err"][:3] == ("negative error in 'e_dist'", "e_dist", "-5")
    assert len(ts.rejected) == 9
    assert ts.meta["rejected_by_reason"]["distance <= 0 in 'dist'"] == 2
    assert sum(ts.meta["rejected_by_reason"].values()) == 9
    assert set(ts.rejected.colnames) == {"row", "name", "reason", "column", "value"}
    # counted by reason in the summary
    s = ts.summary()
    assert "Rejected:  9 rows" in s
    assert "2  distance <= 0 in 'dist'" in s and "2  missing value in 'dist'" in s


def test_dec_out_of_range_and_absurd_av_rejected():
    t = Table({"ra": [10.0, 20.0, 30.0, 400.0], "dec": [-91.0, 10.0, 10.0, 0.0], "dist": [1.0, 2.0, 3.0, 4.0] * u.kpc,
               "e_dist": [0.1] * 4 * u.kpc,
               "A_V": [1.0, 70.0, 1.0, 1.0], "e_A_V": [0.1] * 4})
    with pytest.warns(RowsRejectedWarning, match="3 of 4"):
        ts = read_tracers(t)
    reasons = list(ts.rejected["reason"])
    assert reasons[0] == "'dec' outside [-90, 90] deg"
    # A_V limits are the E(B-V) limits [-0.3, 20] times R_V = 3.1 -> [-0.93, 62]
    assert reasons[1].startswith("A_V in 'A_V' outside the A_V range [-0.93, 62] mag")
    assert reasons[2] == "'ra' outside [0, 360] deg"
    assert list(ts.rejected["value"]) == ["-91", "70", "400"]


def test_a_negative_reddening_within_its_noise_is_kept_and_one_beyond_it_rejected():
    # common practice: a negative excess within its errors of zero is noise around little dust; cutting it
    # at a fixed -0.3 whatever its error biased the mean reddening of noisy low-extinction rows upward
    from dustkit.tracers.rules import NEGATIVE_NSIGMA, validate_rows
    t = Table({"name": ["noisy", "precise", "noisy-far", "in-range"], "l": [1.0, 2.0, 3.0, 4.0], "b": [20.0] * 4,
               "dist": [1.0] * 4 * u.kpc, "e_dist": [0.1] * 4 * u.kpc,
               "ebv": [-0.5, -0.5, -0.8, -0.1], "e_ebv": [0.2, 0.05, 0.2, 0.05]})
    with pytest.warns(RowsRejectedWarning, match="2 of 4"):
        ts = read_tracers(t)
    assert list(ts.name) == ["noisy", "in-range"]  # -0.5 +- 0.2 is 2.5 sigma below zero; -0.8 +- 0.2 is 4 sigma
    assert NEGATIVE_NSIGMA == 3.0
    assert list(ts.rejected["name"]) == ["precise", "noisy-far"]
    assert list(ts.rejected["reason"]) == ["E(B-V) in 'ebv' outside [-0.3, 20] mag"] * 2
    # the out-of-core reader's rule is the same (A_V = R_V E(B-V), errors likewise)
    av, ae = 3.1 * np.array(t["ebv"]), 3.1 * np.array(t["e_ebv"])
    code, _ = validate_rows({"l": np.array(t["l"]), "b": np.array(t["b"]), "distance": np.full(4, 1000.0),
                             "distance_err": np.full(4, 100.0), "av": av, "av_err": ae}, 3.1)
    assert list(code >= 0) == [False, True, True, False]
    # a lower limit of zero or above is applied as given, whatever the errors
    t2 = t.copy()
    t2["ebv"] = [0.05, -0.01, 0.2, 0.3]
    ts = _quiet(read_tracers, t2, reject_limits={"ebv": (0.0, 20.0)})
    assert list(ts.name) == ["noisy", "noisy-far", "in-range"]


def test_reject_limits_can_be_changed():
    t = Table({"l": [1.0, 2.0], "b": [0.0, 0.0], "dist": [1.0, 300.0] * u.kpc, "e_dist": [0.1, 0.1] * u.kpc,
               "ebv": [0.1, 0.1], "e_ebv": [0.01] * 2})
    ts = _quiet(read_tracers, t)
    assert len(ts) == 1 and "outside (0, 200000] pc" in ts.rejected["reason"][0]
    ts = read_tracers(t, reject_limits={"distance": (0, 5e5)})
    assert len(ts) == 2
    assert DEFAULT_REJECT_LIMITS["ebv"] == (-0.3, 20.0)
    with pytest.raises(ParameterError, match="'reject_limits'"):
        read_tracers(t, reject_limits={"colour": (0, 1)})


def test_missing_required_columns_list_what_was_found_and_needed():
    t = Table({"l": [1.0], "b": [0.0], "ebv": [0.1], "mag_V": [12.0]})
    with pytest.raises(CatalogError) as exc:
        read_tracers(t)
    msg = str(exc.value)
    assert "No distance column" in msg and "'mag_V'" in msg and "parallax" in msg and "dist" in msg and "Hint" in msg
    t = Table({"l": [1.0], "b": [0.0], "dist": [100.0]})
    with pytest.raises(CatalogError, match=r"No reddening column.*Columns found: 'l', 'b', 'dist'.*E\(B-V\)"):
        read_tracers(t)
    t = Table({"x": [1.0], "y": [0.0], "dist": [100.0], "ebv": [0.1]})
    with pytest.raises(CatalogError, match=r"No position columns.*'x', 'y'.*glon/glat.*ra/dec"):
        read_tracers(t)


def test_colour_error_column_is_not_mistaken_for_a_reddening():
    # VizieR convention (common practice): 'e_B-V' is the error of the colour 'B-V', not E(B-V)
    t = Table({"l": [1.0], "b": [0.0], "dist": [100.0] * u.pc, "B-V": [0.8], "e_B-V": [0.02]})
    with pytest.raises(CatalogError, match="No reddening column"):
        read_tracers(t)


def test_all_rows_rejected_or_no_rows_is_an_error():
    t = Table({"l": [1.0, 2.0], "b": [95.0, 0.0], "dist": [100.0, -1.0] * u.pc, "ebv": [0.1, 0.1]})
    with pytest.raises(CatalogError, match=r"No usable tracer.*all 2 rows were rejected.*'b' outside"):
        _quiet(read_tracers, t)
    with pytest.raises(CatalogError, match="has no rows"):
        _quiet(read_tracers, t[:0])


def test_unreadable_or_missing_file_names_path_and_hint(tmp_path):
    bad = tmp_path / "broken.fits"
    bad.write_bytes(b"this is not a FITS file")
    with pytest.raises(CatalogError) as exc:
        read_tracers(bad)
    assert str(bad) in str(exc.value) and "Hint" in str(exc.value)
    missing = tmp_path / "nothere.csv"
    with pytest.raises(CatalogError, match=r"nothere\.csv' does not exist"):
        read_tracers(missing)
    with pytest.raises(ParameterError, match="'source'"):
        read_tracers(42)


def test_bad_columns_mapping():
    t = _catalogue()
    with pytest.raises(CatalogError, match=r"columns=\{'ebv': 'E_BV'\} names a column that is not in"):
        read_tracers(t, columns={"ebv": "E_BV"})
    with pytest.raises(ParameterError, match="'columns'"):
        read_tracers(t, columns={"reddening": "EBV"})
    with pytest.raises(CatalogError, match="several reddening columns"):
        read_tracers(t, columns={"ebv": "EBV", "av": "EBV"})
    assert "excess_err" in COLUMN_KEYS and "apparent_modulus" in COLUMN_KEYS


# ======================================================================================
# Sources and formats
# ======================================================================================


@pytest.mark.parametrize("suffix", [".csv", ".ecsv", ".fits", ".vot", ".parquet"])
def test_same_tracers_from_every_file_format(tmp_path, suffix):
    t = _catalogue(n=25)
    t["EBV"][3] = 99.0  # one rejected row, to compare the reports as well
    ref = _quiet(read_tracers, t)
    path = tmp_path / f"clusters{suffix}"
    fmt = {".vot": "votable"}.get(suffix)
    t.write(path, format=fmt) if fmt else t.write(path)
    ts = _quiet(read_tracers, path)
    for attr in ("l", "b", "distance", "distance_err", "av", "av_err", "excess", "excess_err", "row"):
        np.testing.assert_array_equal(getattr(ts, attr), getattr(ref, attr), err_msg=f"{suffix}: {attr}")
    np.testing.assert_array_equal(ts.name, ref.name)
    assert list(ts.rejected["reason"]) == list(ref.rejected["reason"])
    assert ts.meta["sha256_of"] == "file"
    assert ts.meta["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert suffix in SUFFIX_FORMATS


@pytest.mark.parametrize("sep,suffix", [(",", ".csv"), ("\t", ".tsv")])
def test_text_catalogue_with_comment_lines_reads_its_rows(tmp_path, sep, suffix):
    # '#' lines above the header (a title, the units) and between rows are comments (common practice for text
    # tables); they stopped the read ("Number of header columns (1) inconsistent") or became rejected rows. A
    # CSV header that itself starts with '#' ('#l,b,...', as numpy.savetxt writes it) still names the columns
    rows = [["10", "1", "1000", "0.3"], ["20", "-2", "2500", "0.6"]]
    body = [sep.join(r) for r in rows]
    head = sep.join(["l", "b", "dist_pc", "ebv"])
    texts = {
        "above": ["# invented test catalogue", "# distances in pc", head, *body],
        "between": [head, body[0], "# a note about the next row", body[1]],
    }
    if sep == ",":
        texts["hash header"] = ["#" + head, *body]
    for case, lines in texts.items():
        path = tmp_path / f"{case.replace(' ', '_')}{suffix}"
        path.write_text("\n".join(lines) + "\n")
        ts = _quiet(read_tracers, path)
        assert len(ts) == 2 and len(ts.rejected) == 0, case
        np.testing.assert_allclose(ts.distance, [1000.0, 2500.0], err_msg=case)
        np.testing.assert_allclose(ts.av, [0.93, 1.86], rtol=1e-12, err_msg=case)  # A_V = 3.1 E(B-V)


def test_pandas_dataframe_input():
    pd = pytest.importorskip("pandas")
    t = _catalogue()
    df = pd.DataFrame({c: np.asarray(t[c]) for c in t.colnames})
    ts = _quiet(read_tracers, df)
    ref = _quiet(read_tracers, t)
    np.testing.assert_array_equal(ts.distance, ref.distance)
    np.testing.assert_array_equal(ts.av, ref.av)
    np.testing.assert_array_equal(ts.name, ref.name)
    assert "pandas DataFrame" in ts.meta["source"] and ts.meta["sha256_of"] == "arrays"
    # NaN from pandas is a missing value
    df.loc[2, "Dist"] = np.nan
    ts = _quiet(read_tracers, df)
    assert list(ts.rejected["reason"]) == ["missing value in 'Dist'"]


def test_explicit_mapping_wins_over_recognition():
    t = _catalogue()
    t["Red"] = np.asarray(t["EBV"]) * 2
    t["plx"] = 1000.0 / np.asarray(t["Dist"])
    ts = _quiet(read_tracers, t, columns={"ebv": "Red", "parallax": "plx", "name": "e_EBV"})
    np.testing.assert_allclose(ts.excess, np.asarray(t["Red"]))
    # the parallax (10% default error) is used through the distance prior: mode near 1 / parallax
    np.testing.assert_allclose(ts.distance, np.asarray(t["Dist"]), rtol=0.05)
    assert ts.distance_kind == "parallax"
    assert ts.meta["columns"]["ebv"] == "Red" and ts.meta["columns"]["parallax"] == "plx"
    np.testing.assert_array_equal(ts.name, np.asarray(t["e_EBV"]).astype(str))
    # an explicit mapping is matched case-insensitively when there is no exact match
    ts = _quiet(read_tracers, t, columns={"ebv": "red"})
    np.testing.assert_allclose(ts.excess, np.asarray(t["Red"]))


def test_several_candidate_columns_are_announced():
    t = _catalogue()
    t["plx"] = 1000.0 / np.asarray(t["Dist"])
    with pytest.warns(AssumptionWarning, match=r"Several distance columns found: 'Dist' \(distance\), 'plx' \(parallax\); using 'Dist'"):
        read_tracers(t)


# ======================================================================================
# TracerSet behaviour
# ======================================================================================


def test_summary_contents(tmp_path):
    path = _bad_rows_case(tmp_path)
    ts = _quiet(read_tracers, path, distance_unit="pc")
    s = ts.summary()
    assert "3 tracers" in s and "12 input rows" in s and "9 rejected" in s
    assert "l 10.00 .. 20.00 deg" in s and "b -2.00 .. 1.00 deg" in s
    assert "HEALPix pixels at NSIDE 64" in s
    assert "1000 .. 2000 pc" in s
    assert "A_V:" in s and "E(B-V)" in s and "R_V = 3.1" in s
    assert "missing value in 'dist'" in s
    assert "statistical" in s  # the usual caution
    assert "bad.csv" in s


def test_sky_area_uses_healpix_pixel_area():
    # three tracers inside one NSIDE-64 pixel: area = one pixel, 0.839294 deg^2 (Gorski et al. 2005)
    ts = TracerSet.from_arrays([45.0, 45.01, 45.02], [10.0, 10.01, 10.0], [100, 200, 300], [10, 10, 10], [1, 1, 1], [0.1, 0.1, 0.1])
    area, npix = ts.sky_area()
    assert npix == 1
    assert area.to_value(u.deg**2) == pytest.approx(NSIDE64_PIXEL_AREA, rel=1e-5)
    # a tracer longitude range that wraps through l = 0 is reported as one arc
    ts = TracerSet.from_arrays([350.0, 355.0, 5.0], [0, 0, 0], [100] * 3, [10] * 3, [1] * 3, [0.1] * 3)
    assert "l 350.00 .. 5.00 deg (through l = 0)" in ts.summary()
    ts = TracerSet.from_arrays(np.arange(0.0, 360.0, 5.0), np.zeros(72), np.full(72, 100.0), 10.0, 1.0, 0.1)
    assert "l all longitudes" in ts.summary()


def test_sky_area_of_the_whole_sky():
    # points uniform on the sphere occupy all 12 NSIDE^2 pixels: area 4 pi sr (Gorski et al. 2005)
    rng = np.random.default_rng(5)
    n = 50_000
    lon = rng.uniform(0, 360, n)
    lat = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    ts = TracerSet.from_arrays(lon, lat, np.full(n, 100.0), 10.0, 1.0, 0.1)
    area, npix = ts.sky_area(nside=4)
    assert npix == 192 and area.to_value(u.deg**2) == pytest.approx(FULL_SKY_DEG2, rel=1e-9)
    with pytest.raises(ParameterError, match="'nside'"):
        ts.sky_area(nside=12)


def test_from_arrays_quantities_plain_arrays_and_validation():
    ts = TracerSet.from_arrays(
        [10.0, 20.0] * u.deg, [1.0, -1.0] * u.deg, [1.0, 2.0] * u.kpc, [0.1, 0.2] * u.kpc,
        [1.0, 2.0] * u.mag, [0.1, 0.1] * u.mag, name=["a", "b"], rv=3.1,
    )
    np.testing.assert_allclose(ts.distance, [1000.0, 2000.0])
    np.testing.assert_array_equal(ts.name, ["a", "b"])
    plain = TracerSet.from_arrays([10.0, 20.0], [1.0, -1.0], [1000.0, 2000.0], [100.0, 200.0], [1.0, 2.0], [0.1, 0.1])
    np.testing.assert_allclose(plain.distance, ts.distance)
    np.testing.assert_array_equal(plain.name, ["row 0", "row 1"])
    with pytest.warns(RowsRejectedWarning, match="1 of 2"):
        bad = TracerSet.from_arrays([10.0, 20.0], [1.0, 100.0], [1000.0, 2000.0], [100.0, 200.0], [1.0, 2.0], [0.1, 0.1])
    assert len(bad) == 1 and bad.rejected["row"][0] == 1
    # unnamed rows are called after their input row, also when rows are rejected or selected
    assert list(bad.name) == ["row 0"] and list(bad.rejected["name"]) == ["row 1"]
    with pytest.warns(RowsRejectedWarning):
        gap = TracerSet.from_arrays([1.0, 2.0, 3.0, 4.0], [1.0, 95.0, 2.0, 3.0], [500.0] * 4, [50.0] * 4,
                                    [1.0] * 4, [0.1] * 4)
    assert list(gap.name) == ["row 0", "row 2", "row 3"]
    assert list(gap.subset([False, True, True]).name) == ["row 2", "row 3"]
    assert list(gap.with_law("fitzpatrick99", 3.1).name) == ["row 0", "row 2", "row 3"]
    with pytest.raises(ParameterError, match="'distance'"):
        TracerSet.from_arrays([1.0], [1.0], [1.0] * u.mag, [0.1], [1.0], [0.1])


def test_tracerset_is_frozen_and_subset_keeps_rows():
    ts = _quiet(read_tracers, _catalogue())
    with pytest.raises(dataclasses.FrozenInstanceError):
        ts.rv = 4.0
    with pytest.raises(ValueError):
        ts.av[0] = 99.0  # read-only arrays
    mask = ts.distance > 2000
    sub = ts.subset(mask)
    assert len(sub) == int(mask.sum())
    np.testing.assert_array_equal(sub.row, ts.row[mask])
    np.testing.assert_array_equal(sub.av, ts.av[mask])
    idx = ts.subset(np.array([0, 2]))
    np.testing.assert_array_equal(idx.name, ts.name[[0, 2]])
    with pytest.raises(ParameterError, match="'mask'"):
        ts.subset(np.ones(3, dtype=bool))


def test_to_table_units_and_meta():
    ts = _quiet(read_tracers, _catalogue())
    t = ts.to_table()
    assert isinstance(t, QTable)
    assert t["l"].unit == u.deg and t["distance_err"].unit == u.pc and t["av_err"].unit == u.mag
    assert t.meta["excess_kind"] == "E(B-V)" and t.meta["rv"] == 3.1 and t.meta["law"] == "ccm89"
    assert ts.meta["n_input"] == 12 and ts.meta["sha256_of"] == "arrays" and len(ts.meta["sha256"]) == 64
    st = ts.summary_table()
    assert st["n_tracers"][0] == 12 and st["sky_area"].unit == u.deg**2


def test_law_and_rv_are_validated():
    t = _catalogue()
    with pytest.raises(ParameterError, match="'rv'"):
        read_tracers(t, rv=-1.0)
    pytest.importorskip("dustkit.laws")
    with pytest.raises(ParameterError, match="'law'"):
        read_tracers(t, law="no-such-law")


def test_million_rows_in_seconds():
    # vectorised ingestion (DEVELOPERS.md: no Python loops over tracers); generous bound for shared CI machines
    rng = np.random.default_rng(11)
    n = 1_000_000
    t = Table({"ra": rng.uniform(0, 360, n), "dec": rng.uniform(-90, 90, n), "plx": rng.uniform(-0.2, 3, n) * u.mas,
               "e_plx": rng.uniform(0.01, 0.2, n) * u.mas, "ebv": rng.uniform(-0.5, 3, n), "e_ebv": np.full(n, 0.03)})
    start = time.perf_counter()
    ts = _quiet(read_tracers, t)
    elapsed = time.perf_counter() - start
    assert len(ts) + len(ts.rejected) == n
    assert elapsed < 15.0, f"reading 10^6 rows took {elapsed:.1f} s"


# ======================================================================================
# Targets
# ======================================================================================


def test_read_targets_keeps_every_row_and_flags_bad_ones():
    t = Table({"id": ["T1", "T2", "T3", "T4"], "RAJ2000": [0.0, 10.0, 20.0, 30.0], "DEJ2000": [0.0, 95.0, 10.0, 10.0],
               "plx": [2.0, 1.0, -1.0, 0.5] * u.mas, "Vmag": [10.0, 11.0, 12.0, 13.0]})
    with pytest.warns(RowsRejectedWarning, match=r"2 of 4 target rows cannot be placed"):
        tl = read_targets(t)
    assert isinstance(tl, TargetList) and len(tl) == 4
    np.testing.assert_array_equal(tl.valid, [True, False, False, True])
    assert tl.l[0] == pytest.approx(ORIGIN_L, abs=1e-4)  # computed reference, see top of file
    assert np.isnan(tl.l[1]) and np.isnan(tl.distance[2])
    np.testing.assert_allclose(tl.distance[[0, 3]], [500.0, 2000.0])
    assert list(tl.rejected["name"]) == ["T2", "T3"]
    assert tl.table.colnames == t.colnames and len(tl.table) == 4  # input kept as it is
    out = tl.to_table()
    assert out["distance"].unit == u.pc and "Vmag" in out.colnames and list(out["valid"]) == [True, False, False, True]


def test_target_list_table_keeps_earlier_input_columns_of_the_same_name():
    # a target table that went through to_table before holds 'distance' and 'input_distance': both are kept
    t = Table({"l": [30.0, 40.0], "b": [1.0, -1.0], "dist_pc": [800.0, 1500.0],
               "distance": [0.8, 1.5], "input_distance": [0.7, 1.4]})
    out = read_targets(t, columns={"distance": "dist_pc"}).to_table()
    np.testing.assert_array_equal(out["input_distance"], [0.7, 1.4])
    np.testing.assert_array_equal(out["input_distance_2"], [0.8, 1.5])
    np.testing.assert_array_equal(out["distance"].to_value(u.pc), [800.0, 1500.0])


def test_target_parallaxes_too_uncertain_for_one_over_parallax_are_announced():
    # a target list is read with d = 1000 / parallax, a poor and biased distance once the parallax error exceeds
    # about 10-20% of the parallax (Bailer-Jones 2015, PASP 127, 994): such rows are counted in a warning naming
    # the column; precise parallaxes say nothing
    t = Table({"l": [30.0, 40.0, 50.0], "b": [1.0, -1.0, 0.0], "parallax": [1.0, 0.5, 0.4] * u.mas,
               "parallax_error": [0.05, 0.4, 0.2] * u.mas})
    with pytest.warns(AssumptionWarning, match=r"2 of 3 parallaxes in 'parallax' have an error above 20% of the "
                                               r"parallax.*biased.*Bailer-Jones 2015"):
        tl = read_targets(t)
    np.testing.assert_allclose(tl.distance, [1000.0, 2000.0, 2500.0])  # still the distances as given
    t["parallax_error"] = [0.05, 0.05, 0.04] * u.mas
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        read_targets(t)
    assert not any("parallaxes in" in str(w.message) for w in record)


def test_read_targets_refuses_apparent_modulus():
    t = Table({"l": [1.0], "b": [0.0], "(m-M)V": [11.0]})
    with pytest.raises(CatalogError, match=r"apparent V modulus.*needs the reddening"):
        read_targets(t)
    t2 = Table({"l": [1.0], "b": [0.0], "mod": [11.0]})
    with pytest.raises(CatalogError, match=r"apparent modulus cannot place a target"):
        read_targets(t2, columns={"apparent_modulus": "mod"})


def test_read_targets_units_and_missing_distance():
    t = Table({"glon": [10.0], "glat": [1.0], "d_kpc": [2.5]})
    tl = read_targets(t)
    assert tl.distance[0] == pytest.approx(2500.0)
    assert tl.distance_err[0] == 0.0  # a plain target distance is taken as exact (documented)
    with pytest.warns(AssumptionWarning, match="No error column for the distance"):
        tl = read_targets(t, default_distance_frac_err=0.2)
    assert tl.distance_err[0] == pytest.approx(500.0)
    with pytest.raises(CatalogError, match="No distance column"):
        read_targets(Table({"glon": [10.0], "glat": [1.0]}))


def test_tracers_module_imports_only_computation_libraries():
    # layering rule (DEVELOPERS.md): computation code never imports matplotlib, ipywidgets or IPython,
    # not even lazily; nor healpy, because importing it loads matplotlib.pyplot.
    import ast

    import dustkit.tracers as mod

    tree = ast.parse(open(mod.__file__, encoding="utf-8").read())
    imported = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            imported.update(a.name.split(".")[0] for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0:
            imported.add(node.module.split(".")[0])
    assert imported <= {"hashlib", "os", "re", "warnings", "dataclasses", "pathlib", "numpy", "astropy", "pandas"}, imported
    # and the summary adds no plotting module to a fresh process (beyond what the package import did)
    code = (
        "import sys; sys.path.insert(0, '.');"
        "from dustkit.tracers import TracerSet;"
        "ts = TracerSet.from_arrays([1.0, 2.0], [0.0, 1.0], [100.0, 200.0], [10.0, 20.0], [1.0, 2.0], [0.1, 0.1]);"
        "before = set(sys.modules); ts.summary(); ts.sky_area();"
        "print(sorted(m for m in set(sys.modules) - before if m.split('.')[0] in ('matplotlib', 'healpy', 'ipywidgets', 'IPython')))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_galactic_preferred_over_equatorial_and_empty_names_filled(tmp_path):
    # both position systems present: the Galactic columns are used as given (no conversion) and that is noted
    path = tmp_path / "both.csv"
    path.write_text(
        "Name,RAJ2000,DEJ2000,_Glon,_Glat,Dist,e_Dist,EBV,e_EBV\n"
        "Invented-A,0,0,10,1,1000,50,0.3,0.02\n"
        ",0,0,20,2,2000,90,0.4,0.02\n"
    )
    ts = read_tracers(path, distance_unit="pc")
    np.testing.assert_array_equal(ts.l, [10.0, 20.0])
    assert any("Galactic columns ('_Glon', '_Glat') used" in a for a in ts.meta["assumptions"])
    # a missing name becomes 'row <input row index>'
    np.testing.assert_array_equal(ts.name, ["Invented-A", "row 1"])


# ======================================================================================
# Modulus kinds and the A_V - distance correlation
# ======================================================================================


@pytest.mark.parametrize("name", ["dm", "distmod", "modulus", "distance_modulus", "DM"])
def test_ambiguous_modulus_name_is_refused(name):
    # (m-M)_V = mu0 + A_V (definition, common practice): a name that does not say which is not guessed
    t = Table({"l": [30.0], "b": [1.0], name: [11.0], "ebv": [0.3], "e_ebv": [0.02]})
    with pytest.raises(CatalogError, match=rf"{name!r}.*distance_modulus_kind='true' or 'apparent'.*--modulus-kind"):
        _quiet_assumptions(read_tracers, t)
    # ... and read as asked: mu0 = 11 -> 10^(11/5 + 1) pc; apparent: mu0 = 11 - 3.1 * 0.3 (computed)
    ts = _quiet_assumptions(read_tracers, t, distance_modulus_kind="true")
    assert ts.distance[0] == pytest.approx(10 ** (11 / 5 + 1), rel=1e-9) and ts.distance_kind == "distance modulus"
    ts = _quiet_assumptions(read_tracers, t, distance_modulus_kind="apparent")
    assert ts.distance[0] == pytest.approx(10 ** ((11 - 0.93) / 5 + 1), rel=1e-9)
    assert ts.distance_kind == "apparent V modulus"
    with pytest.raises(ParameterError, match="distance_modulus_kind"):
        read_tracers(t, distance_modulus_kind="V")


@pytest.mark.parametrize("name, kind", [("(m-M)0", "distance modulus"), ("mu0", "distance modulus"),
                                        ("dm0", "distance modulus"), ("(m-M)V", "apparent V modulus"),
                                        ("mM_V", "apparent V modulus"), ("apparent_modulus", "apparent V modulus")])
def test_modulus_names_that_say_which(name, kind):
    t = Table({"l": [30.0], "b": [1.0], name: [11.0], "ebv": [0.3], "e_ebv": [0.02]})
    ts = _quiet_assumptions(read_tracers, t)
    assert ts.distance_kind == kind


def test_apparent_modulus_carries_the_anticorrelation():
    # mu0 = (m-M)_V - A_V, so cov(A_V, mu0) = -var(A_V) and corr = -sigma_AV / sqrt(sigma_mV^2 + sigma_AV^2);
    # ln d = mu0 ln10 / 5 + const keeps it (error propagation, common practice)
    t = Table({"l": [40.0, 41.0], "b": [2.0, 2.0], "(m-M)V": [11.55, 12.0], "e_(m-M)V": [0.1, 0.2],
               "E(B-V)": [0.5, 0.4], "e_E(B-V)": [0.03, 0.05]})
    ts = read_tracers(t)
    sav = 3.1 * np.array([0.03, 0.05])
    np.testing.assert_allclose(ts.av_distance_corr, -sav / np.hypot([0.1, 0.2], sav), rtol=1e-12)
    # kept by subset, with_law (re-derived from the new A_V error) and to_table
    np.testing.assert_array_equal(ts.subset([1]).av_distance_corr, ts.av_distance_corr[[1]])
    ts4 = ts.with_law("ccm89", 4.0)
    np.testing.assert_allclose(ts4.av_distance_corr, -4 * np.array([0.03, 0.05]) / np.hypot([0.1, 0.2], 4 * np.array([0.03, 0.05])))
    np.testing.assert_array_equal(ts.to_table()["av_distance_corr"], ts.av_distance_corr)
    # independent errors elsewhere: zeros
    assert np.all(_quiet(read_tracers, _catalogue()).av_distance_corr == 0)


def test_ebv_mu0_correlation_column_is_kept_with_its_sign():
    # corr(E(B-V), mu0) from cluster fits; A_V = R_V E(B-V) and ln d = mu0 ln10/5 + const are positive
    # multiples, so corr(A_V, ln d) is the same number (error propagation, common practice)
    t = Table({"l": [40.0, 41.0, 42.0], "b": [2.0, 2.0, 2.0], "mu0": [10.0, 11.0, 12.0], "e_mu0": [0.1] * 3,
               "ebv": [0.5, 0.4, 0.3], "e_ebv": [0.03] * 3, "ebv_mu0_corr": [-0.6, 0.2, 1.5]})
    with pytest.warns(RowsRejectedWarning, match=r"1 of 3"):
        ts = read_tracers(t)
    np.testing.assert_array_equal(ts.av_distance_corr, [-0.6, 0.2])
    assert "outside [-1, 1]" in ts.rejected["reason"][0]


def test_from_arrays_takes_and_keeps_the_correlation():
    ts = TracerSet.from_arrays([10.0, 20.0], [1.0, 2.0], [1000.0, 2000.0], [100.0, 200.0], [1.0, 2.0], [0.1, 0.2],
                               av_distance_corr=[-0.5, 0.0])
    np.testing.assert_array_equal(ts.av_distance_corr, [-0.5, 0.0])
    ts0 = TracerSet.from_arrays([10.0], [1.0], [1000.0], [100.0], [1.0], [0.1])
    np.testing.assert_array_equal(ts0.av_distance_corr, [0.0])


# ======================================================================================
# Duplicates
# ======================================================================================


def _dup_catalogue():
    return Table({"name": ["A", "B", "C"], "l": [10.0, 20.0, 30.0], "b": [1.0, 2.0, 3.0],
                  "dist": [1000.0, 2000.0, 3000.0] * u.pc, "e_dist": [100.0, 200.0, 300.0] * u.pc,
                  "av": [1.0, 2.0, 3.0], "e_av": [0.1, 0.2, 0.3]})


def test_exact_copies_are_merged_without_shrinking_errors():
    # the same measurement twice is one measurement (common practice): values and errors unchanged
    t = _dup_catalogue()
    tt = Table(np.concatenate([t.as_array(), t.as_array()]))
    with pytest.warns(DuplicatesWarning, match=r"6 of 6 rows are duplicates in 3 groups \(6 exact"):
        ts = read_tracers(tt)
    assert len(ts) == 3 and ts.meta["n_merged"] == 3
    assert len(ts) + len(ts.rejected) + ts.meta["n_merged"] == len(tt)
    np.testing.assert_allclose(ts.av_err, [0.1, 0.2, 0.3])
    np.testing.assert_allclose(ts.distance_err, [100.0, 200.0, 300.0])
    assert set(ts.duplicates["kind"]) <= {"exact"} and len(ts.duplicates) == 6
    assert "Duplicates: 6 rows in 3 groups" in ts.summary()
    # kept on request: taken as given, not searched (and so not reported)
    with warnings.catch_warnings():
        warnings.simplefilter("error", DuplicatesWarning)
        tk = read_tracers(tt, duplicates="keep")
    assert len(tk) == 6 and len(tk.duplicates) == 0 and tk.meta["n_merged"] == 0
    assert "not searched" in tk.summary()


def test_near_duplicates_merge_by_inverse_variance():
    # two compilations of one cluster 0.5 arcsec apart: inverse-variance mean x = sum(x/s^2)/sum(1/s^2),
    # sigma = sum(1/s^2)^-1/2 (common practice)
    t = Table({"name": ["A", "A2", "B"], "l": [10.0, 10.0 + 0.5 / 3600, 20.0], "b": [1.0, 1.0, 2.0],
               "dist": [1000.0, 1100.0, 2000.0] * u.pc, "e_dist": [100.0, 50.0, 200.0] * u.pc,
               "av": [1.0, 1.2, 2.0], "e_av": [0.1, 0.2, 0.2]})
    with pytest.warns(DuplicatesWarning, match=r"2 of 3 rows"):
        ts = read_tracers(t)
    assert len(ts) == 2
    w = 1 / np.array([0.1, 0.2]) ** 2
    assert ts.av[0] == pytest.approx(np.sum(w * [1.0, 1.2]) / w.sum(), rel=1e-12)
    assert ts.av_err[0] == pytest.approx(w.sum() ** -0.5, rel=1e-12)
    wd = 1 / np.array([100.0, 50.0]) ** 2
    assert ts.distance[0] == pytest.approx(np.sum(wd * [1000.0, 1100.0]) / wd.sum(), rel=1e-12)
    assert list(ts.duplicates["row"]) == [0, 1] and list(ts.duplicates["kind"]) == ["near", "near"]
    # the same place but A_V far outside the errors: two tracers
    t["av"][1] = 3.0
    ts = read_tracers(t)
    assert len(ts) == 3 and len(ts.duplicates) == 0


def test_near_duplicates_found_across_l_zero_and_near_the_pole():
    # one invented cluster recorded twice either side of l = 0/360 deg (0.72 arcsec apart at b = 0.5 deg, within
    # the 1 arcsec tolerance): one tracer, at l ~ 0 (the mean of the unit vectors), not at l = 180 (longitude is
    # periodic, common practice). Near the pole two rows 180 deg apart in l are 0.36 arcsec apart: merged too.
    t = Table({"name": ["Wrap-a", "Wrap-b", "Pole-a", "Pole-b", "Other"],
               "l": [359.9999, 0.0001, 10.0, 190.0, 359.9999], "b": [0.5, 0.5, 89.99995, 89.99995, -20.0],
               "dist": [1000.0, 1010.0, 2000.0, 2000.0, 1000.0] * u.pc, "e_dist": [100.0, 100.0, 200.0, 200.0, 100.0] * u.pc,
               "av": [1.0, 1.05, 0.3, 0.31, 1.0], "e_av": [0.1, 0.1, 0.05, 0.05, 0.1]})
    with pytest.warns(DuplicatesWarning, match=r"4 of 5 rows are duplicates in 2 groups"):
        ts = read_tracers(t)
    assert len(ts) == 3
    assert sorted(ts.duplicates["name"]) == ["Pole-a", "Pole-b", "Wrap-a", "Wrap-b"]
    wrap = np.flatnonzero(np.asarray(ts.name) == "Wrap-a")[0]
    lw = float(np.asarray(ts.l)[wrap])  # deg
    sep = min(lw, 360.0 - lw)
    assert sep < 1e-6 and float(np.asarray(ts.b)[wrap]) == pytest.approx(0.5, abs=1e-9)
    assert ts.av[wrap] == pytest.approx(1.025, rel=1e-12)  # equal errors: the plain mean


def test_near_duplicates_found_at_any_longitude_and_latitude():
    # pairs of records of invented clusters a random 0.05-0.99 arcsec apart at random places on the sky: every pair
    # is merged (the separation is the haversine great-circle distance, common practice), also at large l and |b|
    # where l cos b changes by more than the tolerance across it
    rng = np.random.default_rng(5)
    n = 400
    l0, b0 = rng.uniform(0, 360, n), np.degrees(np.arcsin(rng.uniform(-0.999, 0.999, n)))
    sep, pa = rng.uniform(0.05, 0.99, n) / 3600, rng.uniform(0, 2 * np.pi, n)
    b1 = b0 + sep * np.cos(pa)
    l1 = np.mod(l0 + sep * np.sin(pa) / np.cos(np.radians(b0)), 360.0)
    from dustkit._lib.sky import separation_deg

    ok = separation_deg(l0, b0, l1, b1) * 3600 < 0.999  # the flat-sky offset is within the tolerance
    t = Table({"l": np.r_[l0[ok], l1[ok]], "b": np.r_[b0[ok], b1[ok]], "dist": np.full(2 * ok.sum(), 1000.0) * u.pc,
               "e_dist": np.full(2 * ok.sum(), 100.0) * u.pc, "av": np.ones(2 * ok.sum()), "e_av": np.full(2 * ok.sum(), 0.1)})
    with pytest.warns(DuplicatesWarning):
        ts = _quiet_assumptions(read_tracers, t)
    assert ok.sum() > 350 and len(ts) == ok.sum()


def test_same_name_is_a_duplicate_when_close_on_the_sky():
    # two compilations list one invented cluster under one name, centres 3 arcmin apart (centres of one
    # cluster from different member lists differ by arcminutes: common practice): one tracer, by
    # inverse-variance means x = sum(x/s^2)/sum(1/s^2) (common practice)
    t = _dup_catalogue()
    t["name"][2] = "A"
    t["l"][2], t["b"][2] = 10.0 + 3.0 / 60.0, 1.0
    with pytest.warns(DuplicatesWarning, match=r"2 of 3.*the same name within 30 arcmin"):
        ts = read_tracers(t)
    assert len(ts) == 2 and list(ts.duplicates["name"]) == ["A", "A"]
    assert ts.meta["n_merged"] == 1 and ts.meta["same_name_apart"] == 0
    w = 1 / np.array([0.1, 0.3]) ** 2
    assert ts.av[0] == pytest.approx(np.sum(w * [1.0, 3.0]) / w.sum(), rel=1e-12)
    assert ts.l[0] == pytest.approx(10.025, abs=1e-6)


def test_reused_id_far_apart_is_two_tracers_and_reported(tmp_path):
    # two invented surveys put together, both numbering their objects from 1: id 1 at (30, 1) deg, 1500 pc and
    # at (50, 1) deg, 3000 pc are two objects 20 deg apart (common practice: an ID is unique only within its
    # survey). Before, they became one tracer at l = 40 deg, 1800 pc that does not exist.
    path = tmp_path / "two_surveys.csv"
    path.write_text("id,l,b,dist,dist_err,av,av_err\n"
                    "1,30,1,1500,150,1.0,0.1\n"
                    "1,50,1,3000,300,2.0,0.2\n"
                    "2,40,-2,1000,100,0.5,0.1\n")
    with pytest.warns(AssumptionWarning) as record:
        ts = read_tracers(path, distance_unit="pc")
    assert len(ts) == 3 and ts.meta["n_merged"] == 0 and len(ts.duplicates) == 0
    np.testing.assert_allclose(ts.l, [30.0, 50.0, 40.0])
    np.testing.assert_allclose(ts.distance, [1500.0, 3000.0, 1000.0])
    np.testing.assert_allclose(ts.av, [1.0, 2.0, 0.5])
    assert ts.meta["same_name_apart"] == 2
    text = " ".join(str(w.message) for w in record)
    assert "2 rows share their name with rows more than 30 arcmin away" in text
    assert "'1' at (l, b) = (30.000, 1.000) and (50.000, 1.000) deg" in text
    assert "columns={'name': None}" in text and "unique names" in text
    assert any("2 rows under 1 name kept as separate tracers" in a for a in ts.meta["assumptions"])
    # the hint works: read without names, no row is one tracer by name, and nothing is said about names
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        plain = read_tracers(path, distance_unit="pc", columns={"name": None})
    assert len(plain) == 3 and plain.meta["same_name_apart"] == 0
    assert not any("share their name" in str(w.message) for w in record)


def test_same_name_groups_compare_every_pair_within_the_limit():
    # one name reused for objects at three places, listed in alternating order (so rows of one place are never
    # neighbours when sorted by name), each place twice 0.2-25 arcmin apart, also across l = 0/360 and at
    # b = 89.9 deg (where 180 deg of longitude is 12 arcmin); a chain of three rows 20 arcmin apart in steps
    # is one object (joined through its pairs). Checked against every pair's haversine separation (common
    # practice) joined by connected components (scipy), computed here by brute force.
    from scipy.sparse.csgraph import connected_components

    from dustkit._lib.sky import separation_deg

    rng = np.random.default_rng(3)
    places = [(30.0, 1.0), (359.9, 0.0), (120.0, 89.9), (200.0, -40.0), (80.0, 10.0)]
    l, b, names = [], [], []
    for k in range(40):  # 40 names, each at five places, two rows a place
        for rep in range(2):
            for pl, pb in places:
                sep, pa = rng.uniform(0.2, 25.0) / 60.0 * rep, rng.uniform(0, 2 * np.pi)
                b.append(pb + sep * np.cos(pa) * (pb < 89))
                l.append(np.mod(pl + sep * np.sin(pa) / np.cos(np.radians(pb)) + 180.0 * rep * (pb > 89), 360.0))
                names.append(f"N{k}")
    l += [60.0, 60.0 + 20 / 60, 60.0 + 40 / 60]  # a chain: the ends are 40 arcmin apart
    b += [0.0, 0.0, 0.0]
    names += ["chain"] * 3
    n = len(l)
    # A_V 0.05 mag apart from name to name with 0.01 mag errors: rows of different names at one place are never
    # near-duplicates by position (which would join them whatever their names)
    av = [0.1 + 0.05 * int(x[1:]) if x != "chain" else 2.5 for x in names]
    t = Table({"name": names, "l": l, "b": b, "dist": rng.uniform(500, 3000, n) * u.pc,
               "e_dist": np.full(n, 100.0) * u.pc, "av": av, "e_av": np.full(n, 0.01)})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ts = read_tracers(t)
    la, ba, na = np.array(l), np.array(b), np.array(names)
    close = (separation_deg(la[:, None], ba[:, None], la[None], ba[None]) <= 0.5) & (na[:, None] == na[None])
    n_objects = connected_components(close, directed=False)[0]
    assert n_objects == 40 * 5 + 1 and len(ts) == n_objects
    assert ts.meta["same_name_apart"] == 400  # every row of the 40 names; the chain is one object
    assert list(np.asarray(ts.name)).count("chain") == 1


# ======================================================================================
# Error floors in the fits
# ======================================================================================


def test_error_floors_are_public_and_applied_with_a_count():
    from dustkit.tracers import rules

    # the integrator's 3-D model floors A_V errors at 0.02 mag: the same public value here
    assert rules.AV_ERR_FLOOR == 0.02
    d = np.array([1000.0, 2000.0, 3000.0])
    with pytest.warns(AssumptionWarning, match=r"1 of 3 tracers have an A_V error below 0.02 mag and 2 a distance"):
        de, ae = rules.floor_errors(d, [0.0, 5.0, 300.0], [1e-6, 0.1, 0.2])
    np.testing.assert_array_equal(ae, [0.02, 0.1, 0.2])
    np.testing.assert_array_equal(de, [10.0, 20.0, 300.0])


def test_layer_fit_not_captured_by_one_tiny_error():
    # one E(B-V) error of 1e-6 among 60 tracers must not decide the layer: with the floor the fit matches
    # the fit without that row's tiny error (simulated, exponential layer of Joshi 2005-like scale height)
    from dustkit.layer import fit_layer
    rng = np.random.default_rng(5)
    n = 60
    b = rng.uniform(-10, 10, n)
    d = rng.uniform(200, 3000, n)
    z = d * np.sin(np.radians(b)) + 15.0
    av_true = 1.0 * 125.0 / np.maximum(np.abs(np.sin(np.radians(b))), 1e-3) * (1 - np.exp(-np.abs(z) / 125.0)) / 1000
    ae = np.full(n, 0.1)
    av = av_true + rng.normal(0, 0.1, n)
    de = 0.1 * d
    ae_tiny = ae.copy()
    ae_tiny[7] = 3.1e-6
    l = rng.uniform(0, 360, n)
    ref = fit_layer(TracerSet.from_arrays(l, b, d, de, av, np.where(np.arange(n) == 7, 0.02, ae)))
    with pytest.warns(AssumptionWarning, match=r"1 of 60 tracers have an A_V error below"):
        got = fit_layer(TracerSet.from_arrays(l, b, d, de, av, ae_tiny))
    assert got.h == pytest.approx(ref.h, rel=1e-9) and got.a0 == pytest.approx(ref.a0, rel=1e-9)
    assert got.h_err < got.h  # a usable scale height, not 4 852 +- 10 341 pc


# ======================================================================================
# Command line and storage
# ======================================================================================


def test_cli_says_each_assumption_once_and_stops_on_kpc(tmp_path, capsys):
    from dustkit.cli import main

    rng = np.random.default_rng(2)
    n = 60
    t = Table({"l": rng.uniform(10, 20, n), "b": rng.uniform(-3, 3, n), "Dist": rng.uniform(0.3, 3.0, n),
               "ebv": rng.uniform(0.1, 1.0, n), "e_ebv": np.full(n, 0.03)})
    t.write(tmp_path / "c.csv")
    assert main(["layer", str(tmp_path / "c.csv")]) == 1
    err = capsys.readouterr().err
    assert "median value of" in err and "--distance-unit kpc" in err
    assert main(["layer", str(tmp_path / "c.csv"), "--distance-unit", "kpc"]) == 0
    captured = capsys.readouterr()
    text = captured.out + captured.err
    # "No error column for the distance" is an assumption: printed in the summary, not again as a warning
    assert text.count("No error column for the distance") == 1
    t.rename_column("Dist", "dm")
    t["dm"] = 5 * np.log10(np.asarray(t["dm"]) * 1000) - 5
    t.write(tmp_path / "m.csv")
    assert main(["layer", str(tmp_path / "m.csv")]) == 1
    assert "--modulus-kind" in capsys.readouterr().err
    assert main(["layer", str(tmp_path / "m.csv"), "--modulus-kind", "true"]) == 0


def test_one_parquet_file_and_a_folder_of_parts_give_the_same_model(tmp_path):
    pytest.importorskip("pyarrow")
    from dustkit.model import ExtinctionModel
    from dustkit.scale import build_path
    from dustkit.tracers.reader import catalogue_rows

    rng = np.random.default_rng(4)
    n = 4000
    t = Table({"l": rng.uniform(10, 30, n), "b": rng.uniform(-5, 5, n), "distance": rng.uniform(100, 3000, n) * u.pc,
               "distance_err": rng.uniform(10, 100, n) * u.pc, "av": rng.uniform(0.1, 3, n),
               "av_err": rng.uniform(0.05, 0.2, n)})
    t.write(tmp_path / "one.parquet")
    (tmp_path / "parts").mkdir()
    for k in range(4):
        t[k * 1000:(k + 1) * 1000].write(tmp_path / "parts" / f"part-{k}.parquet")
    assert catalogue_rows(tmp_path / "one.parquet") == catalogue_rows(tmp_path / "parts") == n
    assert build_path(tmp_path / "one.parquet") == build_path(tmp_path / "parts") == "memory"
    one = _quiet(read_tracers, tmp_path / "one.parquet")
    folder = _quiet(read_tracers, tmp_path / "parts")
    for k in ("l", "b", "distance", "distance_err", "av", "av_err"):
        np.testing.assert_array_equal(getattr(one, k), getattr(folder, k))
    kw = dict(nside=8, distance_max=3000 * u.pc, distance_step=500 * u.pc, quiet=True)
    m1 = ExtinctionModel(**kw).fit(one)
    m2 = ExtinctionModel(**kw).fit(folder)
    assert m1.uncertainty_scheme_ == m2.uncertainty_scheme_
    np.testing.assert_array_equal(m1.av_, m2.av_)
    np.testing.assert_array_equal(m1.av_err_, m2.av_err_)


# ======================================================================================
# Random corruptions of a valid catalogue
# ======================================================================================


@settings(max_examples=60, deadline=None)
@given(st.data())
def test_corrupted_catalogues_never_crash_and_every_row_is_counted(data):
    # property: whatever is done to a valid catalogue, reading it ends in a TracerSet or a dustkit error,
    # and accepted + rejected + merged rows = input rows, each rejected row with its reason
    from dustkit.exceptions import DustkitError

    rng = np.random.default_rng(data.draw(st.integers(0, 2**16)))
    n = 30
    cols = {"name": np.array([f"C{i}" for i in range(n)]), "l": rng.uniform(0, 360, n), "b": rng.uniform(-20, 20, n),
            "dist": rng.uniform(200, 4000, n), "e_dist": rng.uniform(10, 200, n), "ebv": rng.uniform(0, 2, n),
            "e_ebv": rng.uniform(0.01, 0.1, n)}
    cols = {k: v.astype(object) for k, v in cols.items()}
    for _ in range(data.draw(st.integers(0, 6))):
        what = data.draw(st.sampled_from(["blank", "text", "dup", "rename", "unit", "zero_err", "negative"]))
        key = data.draw(st.sampled_from(sorted(cols)))
        i = data.draw(st.integers(0, len(cols[key]) - 1))
        if what == "blank":
            cols[key][i] = ""
        elif what == "text":
            cols[key][i] = data.draw(st.sampled_from(["abc", "1,5", "--", "nan", "inf", "12:30:00"]))
        elif what == "dup":
            cols = {k: np.append(v, v[i]) for k, v in cols.items()}
        elif what == "rename":
            new = data.draw(st.sampled_from(["DM", "mu0", "plx", "Av", "x", "dist_kpc", "E(B-V)", "id"]))
            if new not in cols:
                cols = {(new if k == key else k): v for k, v in cols.items()}
        elif what == "unit" and key in ("dist", "e_dist"):
            cols[key] = np.array([v / 1000.0 if isinstance(v, float) else v for v in cols[key]], dtype=object)
        elif what == "zero_err" and key.startswith("e_"):
            cols[key][i] = 0.0
        elif what == "negative":
            cols[key][i] = -1.0
    n_in = len(next(iter(cols.values())))
    table = Table({k: np.array([str(x) for x in v]) if any(isinstance(x, str) for x in v) else v.astype(float)
                   for k, v in cols.items()})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            ts = read_tracers(table)
        except DustkitError as exc:
            assert str(exc)  # a message, never a bare error
            return
    assert len(ts) + len(ts.rejected) + ts.meta["n_merged"] == n_in
    assert all(isinstance(r, str) and r for r in ts.rejected["reason"])
    assert np.all(np.isfinite(ts.av) & np.isfinite(ts.distance) & (ts.distance > 0) & (ts.av_err > 0))


# ------------------------------------------------ per-row source temperatures (colour excesses)
def _ebprp_catalogue(extra, excess=0.16):
    """Invented E(BP-RP) tracers, one per row of the ``extra`` columns (no real objects)."""
    n = len(next(iter(extra.values())))
    t = Table({"name": [f"Invented-{i:02d}" for i in range(n)], "l": np.linspace(10.0, 40.0, n),
               "b": np.linspace(-3.0, 3.0, n), "distance": np.linspace(400.0, 2000.0, n) * u.pc,
               "E(BP-RP)": np.full(n, excess) * u.mag, "e_E(BP-RP)": np.full(n, 0.02) * u.mag})
    for k, v in extra.items():
        t[k] = v
    return t


def _k_g_after_ingestion(ts, law="fitzpatrick99"):
    """A_G / A_0 per tracer, A_0 the monochromatic extinction at 550 nm (Gaia's convention)."""
    from dustkit.bands import av_to_band
    from dustkit.laws import get_law

    a0_over_av = float(get_law(law).a_over_av(0.55 * u.micron, ts.rv))
    a_g, _ = av_to_band(ts.av, None, "G", law=law, rv=ts.rv, temperature=ts.temperature * u.K)
    return a_g / (ts.av * a0_over_av)


def test_intrinsic_colour_column_gives_babusiaux_k_g_per_row():
    # k_G = A_G/A_0 is about 0.96 at (BP-RP)_0 = 0 and 0.67 at 2.0 for small A_0
    # (Gaia Collaboration, Babusiaux et al. 2018, A&A 616, A10; values from memory,
    # tolerance 0.03). E(BP-RP) = 0.16 mag is A_0 of about 0.3 there.
    t = _ebprp_catalogue({"(BP-RP)_0": [0.0, 2.0, 0.82]})
    ts = _quiet(read_tracers, t, law="fitzpatrick99")
    assert ts.meta["columns"]["intrinsic_color"] == "(BP-RP)_0"
    a0 = ts.av * 0.98  # A_0 / A_V under F99 (computed), only to check A_0 is small
    assert np.all((a0 > 0.2) & (a0 < 0.45))
    k_g = _k_g_after_ingestion(ts)
    assert k_g[0] == pytest.approx(0.96, abs=0.03)
    assert k_g[1] == pytest.approx(0.67, abs=0.03)
    assert k_g[2] == pytest.approx(0.83, abs=0.03)  # (BP-RP)_0 = 0.82: 0.83 (same source)
    # the same E(BP-RP) means more dust in front of a cool star (smaller k_BP - k_RP)
    assert ts.av[1] > 1.1 * ts.av[0]


def test_temperature_column_is_used_per_row_and_kept():
    # an A0 V star has T_eff about 9700 K and (BP-RP)_0 about 0 (Pecaut & Mamajek 2013,
    # ApJS 208, 9; from memory): k_G about 0.96 at small A_0 (Babusiaux et al. 2018, from memory)
    t = _ebprp_catalogue({"Teff": [9700.0, 4000.0, 10000.0, 5800.0]})
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        ts = read_tracers(t, law="fitzpatrick99")
    np.testing.assert_array_equal(ts.temperature, [9700.0, 4000.0, 10000.0, 5800.0])
    assert ts.meta["columns"]["temperature"] == "Teff"
    assert not any("No temperature" in str(w.message) for w in record)
    k_g = _k_g_after_ingestion(ts)
    assert k_g[0] == pytest.approx(0.96, abs=0.03)
    # a 4 000 K and a 10 000 K star differ in A_G/A_V by well over 10% (issue 15; Babusiaux
    # et al. 2018: k_G 0.96 -> 0.67 from (BP-RP)_0 = 0 to 2, from memory)
    assert k_g[2] / k_g[1] > 1.10
    # each row is the scalar conversion at its own temperature
    from dustkit.bands import excess_to_av

    for i, temp in enumerate(ts.temperature):
        av, av_err = excess_to_av(0.16, 0.02, "BP", "RP", law="fitzpatrick99", rv=3.1, temperature=temp * u.K)
        assert ts.av[i] == pytest.approx(av, rel=1e-12) and ts.av_err[i] == pytest.approx(av_err, rel=1e-12)
    # the temperatures are a column of the table, in K
    assert ts.to_table()["temperature"].unit == u.K


@pytest.mark.parametrize("column", ["teff", "T_eff", "Teff_K", "teff_gspphot", "temperature"])
def test_temperature_column_spellings(column):
    t = _ebprp_catalogue({column: [4500.0, 7000.0]})
    ts = _quiet(read_tracers, t)
    assert ts.meta["columns"]["temperature"] == column
    np.testing.assert_array_equal(ts.temperature, [4500.0, 7000.0])


def test_log_temperature_and_explicit_columns():
    t = _ebprp_catalogue({"logTeff": [np.log10(4500.0), np.log10(7000.0)]})
    ts = _quiet(read_tracers, t)
    np.testing.assert_allclose(ts.temperature, [4500.0, 7000.0], rtol=1e-12)
    t2 = _ebprp_catalogue({"STAR_T": [4500.0, 7000.0], "C0": [1.2, 0.3]})
    ts2 = _quiet(read_tracers, t2, columns={"temperature": "STAR_T"})
    np.testing.assert_allclose(ts2.av, ts.av, rtol=1e-12)
    ts3 = _quiet(read_tracers, t2, columns={"intrinsic_color": "C0"}, intrinsic_color_bands="BP-RP")
    from dustkit.bands import colour_temperature

    np.testing.assert_allclose(ts3.temperature, colour_temperature([1.2, 0.3], "BP", "RP").to_value(u.K))
    with pytest.raises(CatalogError, match=r"'C0'.*intrinsic_color_bands"):
        _quiet(read_tracers, t2, columns={"intrinsic_color": "C0"})


def test_round_trip_per_row_and_under_another_law():
    from dustkit.bands import av_to_excess

    t = _ebprp_catalogue({"teff": [3500.0, 5000.0, 8000.0, 20000.0, 60000.0]}, excess=0.8)
    ts = _quiet(read_tracers, t)
    # E(BP-RP) -> A_V -> E(BP-RP) per row, each at its own star (round trip to 1e-6; common practice)
    back, _ = av_to_excess(ts.av, None, "BP", "RP", law=ts.law, rv=ts.rv, temperature=ts.temperature * u.K)
    np.testing.assert_allclose(back, ts.excess, atol=1e-6)
    # with_law re-derives A_V with the same temperatures: the same round trip under the new law
    t2 = ts.with_law("odonnell94", 3.6)
    np.testing.assert_array_equal(t2.temperature, ts.temperature)
    back2, _ = av_to_excess(t2.av, None, "BP", "RP", law="odonnell94", rv=3.6, temperature=t2.temperature * u.K)
    np.testing.assert_allclose(back2, ts.excess, atol=1e-6)
    assert not np.allclose(t2.av, ts.av, rtol=1e-3)  # R_V changed A_V
    # subsets keep each tracer's temperature
    sub = ts.subset(np.array([4, 0]))
    np.testing.assert_array_equal(sub.temperature, [60000.0, 3500.0])
    np.testing.assert_array_equal(sub.with_law("odonnell94", 3.6).av, t2.av[[4, 0]])


def test_bad_temperature_cells_are_rejected_with_the_column_and_missing_ones_announced():
    t = _ebprp_catalogue({"teff": np.array(["4000", "hot", "-300", "", "7000", "nan"])})
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        ts = read_tracers(t, duplicates="keep")
    # row counts preserved: every input row is a tracer or a rejected row with its reason
    assert len(ts) + len(ts.rejected) == ts.meta["n_input"] == 6
    rej = {int(r["row"]): (str(r["reason"]), str(r["column"]), str(r["value"])) for r in ts.rejected}
    assert rej[1] == ("non-numeric value in 'teff'", "teff", "hot")
    assert rej[2] == ("temperature <= 0 K in 'teff'", "teff", "-300")
    assert set(rej) == {1, 2}
    np.testing.assert_array_equal(ts.row, [0, 3, 4, 5])
    np.testing.assert_array_equal(ts.temperature, [4000.0, 5800.0, 7000.0, 5800.0])
    msgs = [str(w.message) for w in record]
    missing = [m for m in msgs if "no value in 'teff'" in m]
    assert len(missing) == 1 and missing[0].startswith("2 rows have") and "5800 K" in missing[0]
    assert any("2 of 6 rows rejected" in m for m in msgs)


def test_default_temperature_is_announced_once_and_can_be_chosen():
    t = _ebprp_catalogue({"other": [1.0, 2.0]})
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        ts = read_tracers(t)
    said = [str(w.message) for w in record if "No temperature or intrinsic-colour column" in str(w.message)]
    assert len(said) == 1 and "5800 K" in said[0] and "source_temperature" in said[0]
    assert issubclass(next(w.category for w in record if str(w.message) == said[0]), AssumptionWarning)
    assert said[0] in ts.meta["assumptions"]
    np.testing.assert_array_equal(ts.temperature, [5800.0, 5800.0])
    # a chosen temperature is used for every row (and recorded, not warned about)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        cool = read_tracers(t, source_temperature=4000 * u.K)
    assert not any("No temperature" in str(w.message) for w in record)
    np.testing.assert_array_equal(cool.temperature, [4000.0, 4000.0])
    assert any("4000 K blackbody" in a for a in cool.meta["assumptions"])
    assert np.all(cool.av > ts.av)  # cooler stars: smaller E(BP-RP)/A_V, so more A_V
    # the default fills empty cells of a temperature column too
    t["teff"] = np.ma.masked_array([4000.0, 0.0], mask=[False, True])
    part = _quiet(read_tracers, t, source_temperature=4000 * u.K)
    np.testing.assert_array_equal(part.temperature, [4000.0, 4000.0])
    with pytest.raises(ParameterError, match="temperature"):
        _quiet(read_tracers, t, source_temperature=500 * u.K)


def test_ebv_tracers_do_not_depend_on_the_star():
    # A_V = R_V E(B-V) under every law, whatever the star (the one E(B-V) convention)
    t = _ebprp_catalogue({"teff": ["4000", "hot"]})
    t.rename_column("E(BP-RP)", "E(B-V)")
    t.rename_column("e_E(BP-RP)", "e_E(B-V)")
    ts = _quiet(read_tracers, t)
    assert len(ts) == 2 and len(ts.rejected) == 0  # the unused column rejects nothing
    assert ts.temperature is None and "temperature" not in ts.meta["columns"]
    np.testing.assert_allclose(ts.av, 3.1 * 0.16, rtol=1e-12)
    assert any("'teff' not used" in a for a in ts.meta["assumptions"])


def test_intrinsic_colour_names_are_told_from_moduli():
    from dustkit.tracers.reddening import intrinsic_color_bands

    for name, pair in (("(BP-RP)_0", ("BP", "RP")), ("bp_rp0", ("BP", "RP")), ("(B-V)0", ("B", "V")),
                       ("BP-RP_int", ("BP", "RP")), ("intrinsic_J-Ks", ("J", "Ks")), ("(G-RP)_0", ("G", "RP"))):
        assert intrinsic_color_bands(name) == pair, name
    for name in ("(m-M)0", "mu0", "av0", "dm0", "BP-RP", "E(BP-RP)", "teff"):
        assert intrinsic_color_bands(name) is None, name


def test_gaia_dr2_excess_column_is_recognised():
    t = _ebprp_catalogue({"teff": [4500.0, 7000.0]})
    t.rename_column("E(BP-RP)", "E(BP_DR2-RP_DR2)")
    t.rename_column("e_E(BP-RP)", "e_E(BP_DR2-RP_DR2)")
    ts = _quiet(read_tracers, t)
    assert ts.excess_kind == "E(BP_DR2-RP_DR2)" and ts.excess_color == ("BP_DR2", "RP_DR2")
    from dustkit.bands import excess_to_av

    av, _ = excess_to_av(0.16, 0.02, "BP_DR2", "RP_DR2", temperature=4500 * u.K)
    assert ts.av[0] == pytest.approx(av, rel=1e-12)


def test_crowded_field_is_not_merged_but_two_compilations_are():
    # 40 distinct stars within 0.5 arcsec of one point (a crowded field) at distances 1000..4900 pc with
    # 1% errors and A_V 0.5..4.4 mag +- 0.02: no two agree within 2 sigma, so none may be merged
    # (cross-matching needs position AND measurement agreement, common practice)
    rng = np.random.default_rng(3)
    n = 40
    k = np.arange(n)
    crowd = Table({"l": 50.0 + rng.uniform(-0.3, 0.3, n) / 3600, "b": 1.0 + rng.uniform(-0.3, 0.3, n) / 3600,
                   "dist": (1000.0 + 100.0 * k) * u.pc, "e_dist": 0.01 * (1000.0 + 100.0 * k) * u.pc,
                   "av": 0.5 + 0.1 * k, "e_av": np.full(n, 0.02)})
    with warnings.catch_warnings():
        warnings.simplefilter("error", DuplicatesWarning)
        ts = _quiet_assumptions(read_tracers, crowd)
    assert len(ts) == n and len(ts.duplicates) == 0
    # two compilations of the same 40 clusters (positions 0.3 arcsec apart, values within errors): 40 groups of 2
    other = crowd.copy()
    other["l"] = other["l"] + 0.3 / 3600
    other["dist"] = other["dist"] * 1.005
    other["av"] = other["av"] + 0.03
    both = vstack([crowd, other])
    with pytest.warns(DuplicatesWarning, match=r"80 of 80 rows are duplicates in 40 groups"):
        ts = _quiet_assumptions(read_tracers, both)
    assert len(ts) == n and set(np.bincount(np.asarray(ts.duplicates["group"]))) == {2}
    # every row of a group is one cluster: the k-th of each compilation
    g = np.asarray(ts.duplicates["group"])
    rows = np.asarray(ts.duplicates["row"])
    order = np.lexsort((rows, g))
    assert np.array_equal(rows[order][0::2] % n, rows[order][1::2] % n)
    # a tolerance of 0 arcsec: only names and exact copies; the two compilations stay apart
    assert len(_quiet_assumptions(read_tracers, both, duplicate_separation=0)) == 2 * n
    with pytest.raises(ParameterError, match="duplicate_separation"):
        read_tracers(both, duplicate_separation=1 * u.pc)


def test_merged_groups_combine_correlation_and_asymmetric_errors():
    from dustkit.tracers.duplicates import merge_groups

    # two measurements of one tracer with correlated errors: with inverse-variance means A = sum(wa a)/sum(wa),
    # D = sum(wd d)/sum(wd), cov(A, D) = sum(wa wd rho s_a s_d)/(sum wa sum wd) (error propagation, common practice)
    sa, sd, rho = np.array([0.1, 0.2]), np.array([100.0, 50.0]), np.array([-0.8, -0.4])
    fields = {"l": np.array([10.0, 10.0]), "b": np.array([1.0, 1.0]), "distance": np.array([1000.0, 1050.0]),
              "distance_err": sd, "av": np.array([1.0, 1.1]), "av_err": sa, "excess": np.array([1.0, 1.1]),
              "excess_err": sa, "av_distance_corr": rho,
              "distance_err_low": np.array([80.0, 45.0]), "distance_err_high": np.array([120.0, 55.0])}
    group = np.array([0, 0])
    keep, merged, report = merge_groups(group, np.zeros(2, bool), np.zeros(2, bool), fields, np.arange(2), None)
    wa, wd = 1 / sa**2, 1 / sd**2
    cov = np.sum(wa * wd * rho * sa * sd) / (wa.sum() * wd.sum())
    sig_a, sig_d = wa.sum() ** -0.5, wd.sum() ** -0.5
    assert merged["av_distance_corr"][0] == pytest.approx(cov / (sig_a * sig_d), rel=1e-12)
    assert merged["distance_err"][0] == pytest.approx(sig_d, rel=1e-12)
    # asymmetric errors: the skew kept (ratios low/sigma averaged with the distance weights), low + high = 2 sigma
    r_low = np.sum(wd * fields["distance_err_low"] / sd) / wd.sum()
    assert merged["distance_err_low"][0] == pytest.approx(r_low * sig_d, rel=1e-12)
    assert merged["distance_err_low"][0] + merged["distance_err_high"][0] == pytest.approx(2 * sig_d, rel=1e-12)
    assert merged["distance_err_low"][0] < merged["distance_err_high"][0]
    # from a catalogue: two parallaxes of one star (same name) give one tracer with the combined errors
    t = Table({"name": ["S", "S"], "l": [10.0, 10.0], "b": [1.0, 1.0], "parallax": [0.5, 0.55] * u.mas,
               "parallax_err": [0.1, 0.12] * u.mas, "av": [1.0, 1.1], "e_av": [0.1, 0.1]})
    with pytest.warns(DuplicatesWarning):
        ts = _quiet_assumptions(read_tracers, t)
    single = _quiet_assumptions(read_tracers, t, duplicates="keep")
    assert len(ts) == 1 and ts.distance_err_low[0] + ts.distance_err_high[0] == pytest.approx(2 * ts.distance_err[0])
    assert ts.distance_err[0] < single.distance_err.min()


def test_a_name_column_shared_by_a_crowd_of_rows_is_refused_with_a_hint():
    # a column read as names ('source') that holds one survey label for 4000 rows within half a degree does not name
    # objects (an identifier names one object: common practice); comparing its 8 million pairs is refused, naming
    # the column and the value, and the hint's columns={'name': None} reads the catalogue
    rng = np.random.default_rng(2)
    n = 4000
    t = Table({"source": np.full(n, "SurveyQ"), "l": rng.uniform(30.0, 30.4, n), "b": rng.uniform(0.0, 0.4, n),
               "dist": rng.uniform(500, 3000, n) * u.pc, "e_dist": np.full(n, 100.0) * u.pc,
               "av": rng.uniform(0.1, 3, n), "e_av": np.full(n, 0.1)})
    with pytest.raises(CatalogError, match=r"name column 'source'.*'SurveyQ' is shared by \d+ rows.*"
                                           r"columns=\{'name': None\}"):
        _quiet_assumptions(read_tracers, t)
    ts = _quiet_assumptions(read_tracers, t, columns={"name": None})
    assert len(ts) + ts.meta["n_merged"] == n and ts.meta["same_name_apart"] == 0


def test_right_ascension_within_24_without_a_unit_is_said_to_be_hours_perhaps():
    # RA in hours is as common as RA in degrees (common practice); the North Galactic Pole's RA (192.85948 deg, see
    # NGP_RA above) written as hours, 12.857299, read as deg lands 180 deg of RA away: warned, naming the column and
    # the hint; with the unit hourangle it is the pole (b = 90 deg), and no warning
    t = Table({"RA_h": [NGP_RA / 15.0, 3.0], "Dec": [NGP_DEC, 10.0], "dist_pc": [100.0, 200.0], "E(B-V)": [0.2, 0.3]})
    with pytest.warns(AssumptionWarning, match=r"Column 'RA_h' has no unit and every right ascension is within "
                                               r"0\.\.24 \(2 rows.*may be hours.*hourangle"):
        read_tracers(t, columns={"ra": "RA_h", "dec": "Dec"})
    t["RA_h"].unit = u.hourangle
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        ts = read_tracers(t, columns={"ra": "RA_h", "dec": "Dec"})
    assert not any("may be hours" in str(w.message) for w in record)
    assert ts.b[0] == pytest.approx(90.0, abs=1e-4)
    # degrees beyond 24 say nothing
    t2 = Table({"RA": [NGP_RA, 3.0], "Dec": [NGP_DEC, 10.0], "dist_pc": [100.0, 200.0], "E(B-V)": [0.2, 0.3]})
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        read_tracers(t2)
    assert not any("may be hours" in str(w.message) for w in record)
    # sexagesimal strings are hours already (common practice): 00:30:00 and 01:20:00 are 7.5 and 20 deg of RA, inside
    # 0..24 once converted, and say nothing of hours either
    t3 = Table({"RA": ["00:30:00", "01:20:00"], "Dec": [NGP_DEC, 10.0], "dist_pc": [100.0, 200.0], "E(B-V)": [0.2, 0.3]})
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        ts3 = read_tracers(t3)
    assert not any("may be hours" in str(w.message) for w in record)
    assert any("sexagesimal" in str(w.message) for w in record)
    assert ts3.b[1] == pytest.approx(SkyCoord(ra=20.0 * u.deg, dec=10.0 * u.deg).galactic.b.deg, abs=1e-6)


def test_right_ascension_in_hours_of_time_from_a_fits_file_is_hour_angle(tmp_path):
    # FITS and VOTable files write hours of RA as TUNIT 'h' (common practice; the FITS standard has no hour-angle
    # unit), which astropy reads as an hour of time. The North Galactic Pole and the Galactic centre (ICRS, see
    # NGP_RA and GC_RA above) written in such hours are b = 90 deg and (l, b) = (0, 0), for tracers and targets
    from astropy.io import fits

    cols = [fits.Column(name="RA", format="D", unit="h", array=np.array([NGP_RA, GC_RA]) / 15.0),
            fits.Column(name="DEC", format="D", unit="deg", array=np.array([NGP_DEC, GC_DEC])),
            fits.Column(name="dist_pc", format="D", array=np.array([500.0, 800.0])),
            fits.Column(name="EBV", format="D", array=np.array([0.2, 0.4]))]
    path = tmp_path / "ra_hours.fits"
    fits.BinTableHDU.from_columns(cols).writeto(path)
    ts = _quiet(read_tracers, path)
    assert ts.b[0] == pytest.approx(90.0, abs=1e-4)
    assert abs((ts.l[1] + 180.0) % 360.0 - 180.0) < 1e-4 and abs(ts.b[1]) < 1e-4
    assert any("hour angle" in a for a in ts.meta["assumptions"])
    tl = _quiet(read_targets, path)
    np.testing.assert_allclose(tl.b, ts.b, atol=1e-9)


def test_target_list_in_kpc_without_a_unit_is_refused_in_words_about_targets():
    # an invented target list with distances 0.8-2.5 (kpc, the common unit of such lists: common practice) and no
    # unit: read as pc the targets would sit at a few pc, so the read stops, speaking of targets (not of tracers
    # or star clusters), with the hint; distance_unit='kpc' reads it
    t = Table({"l": [30.0, 40.0, 50.0], "b": [0.0, 1.0, -1.0], "Dist": [0.8, 1.5, 2.5]})
    with pytest.raises(CatalogError) as err:
        read_targets(t)
    text = str(err.value)
    assert "'Dist'" in text and "median value of 1.5" in text and "put the targets at a few pc" in text
    assert "tracer" not in text and "star cluster" not in text and "distance_unit='kpc'" in text
    targets = read_targets(t, distance_unit="kpc")
    np.testing.assert_allclose(targets.distance, [800.0, 1500.0, 2500.0])


def test_a_no_value_number_recurring_at_a_columns_edge_is_announced():
    # catalogues write 99.99 or -999 for "no value" (common practice): read as given, such a number
    # recurring as a column's smallest or largest value is announced with its count and first row;
    # the same number once, or inside the column's range, is not
    base = {"name": [f"Inv {i}" for i in range(6)], "l": [10.0, 20, 30, 40, 50, 60], "b": [0.0, 1, -1, 2, 0, 1],
            "ebv": [0.3, 0.5, 0.6, 0.2, 0.4, 0.5]}

    def said(distances):
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            tr = read_tracers(Table({**base, "distance": distances}), distance_unit="pc")
        return tr, [str(w.message) for w in seen if "for 'no value'" in str(w.message)]

    tr, notes = said([1200.0, 99.99, 2300, 99.99, 800, 1500])
    assert len(notes) == 1 and "2 rows of column 'distance' hold 99.99 (first at row 1)" in notes[0]
    assert np.sum(np.asarray(tr.distance) == 99.99) == 2  # read as given, not dropped
    assert said([1200.0, 99.99, 2300, 150.0, 800, 1500])[1] == []
    assert said([1200.0, 999.0, 2300, 999.0, 800, 1500])[1] == []  # inside the range: a plain distance


def test_a_no_value_number_in_an_error_column_is_announced_even_once():
    # an E(B-V) error of 99.99 (a 'no value' number, common practice) gives its row no weight: the
    # reader said nothing of it, once or recurring (the error column's notes were lost); now it names
    # the row, the column and the fix, and the row is kept as read
    base = {"name": [f"Inv {i}" for i in range(6)], "l": [10.0, 20, 30, 40, 50, 60], "b": [0.0, 1, -1, 2, 0, 1],
            "distance": [1200.0, 900, 2300, 1500, 800, 1500] * u.pc, "ebv": [0.3, 0.5, 0.6, 0.2, 0.4, 0.5]}

    def said(errors):
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            tr = read_tracers(Table({**base, "e_ebv": errors}))
        return tr, [str(w.message) for w in seen if "for 'no value'" in str(w.message)]

    tr, notes = said([0.03, 0.03, 99.99, 0.04, 0.03, 0.05])
    assert len(notes) == 1 and "Row 2 of column 'e_ebv' holds 99.99" in notes[0] and "default error" in notes[0]
    assert len(tr) == 6 and np.asarray(tr.av_err)[2] > 100  # kept as read: no weight
    notes = said([0.03, 99.99, 0.05, 99.99, 0.03, 0.05])[1]
    assert len(notes) == 1 and "2 rows of column 'e_ebv' hold 99.99 (first at row 1)" in notes[0]
    assert said([0.03, 0.03, 0.5, 0.04, 0.03, 0.05])[1] == []


def test_a_reddening_column_in_millimag_without_a_unit_gets_the_fix():
    # E(B-V) written in mmag with no unit (350 for 0.35 mag): every row is out of range; the
    # refusal says the values look like millimagnitudes and how to say so, and with the unit
    # the same values read as mag (1 mmag = 0.001 mag, definition)
    ebv = [350.0, 520, 610, 180, 430, 505]
    t = Table({"name": [f"Inv {i}" for i in range(6)], "l": [10.0, 20, 30, 40, 50, 60], "b": [0.0, 1, -1, 2, 0, 1],
               "distance": [1200.0, 900, 2300, 1500, 800, 1500] * u.pc, "ebv": ebv})
    with pytest.raises(CatalogError, match=r"Column 'ebv' has no unit.*millimagnitudes.*'mmag'"):
        read_tracers(t)
    t["ebv"].unit = u.mmag
    tr = read_tracers(t, rv=3.1)
    np.testing.assert_allclose(np.asarray(tr.av), 3.1 * np.asarray(ebv) / 1000.0)


def test_a_distance_modulus_in_millimag_is_read_in_mag():
    # a true modulus of 10 mag is 1 000 pc (d = 10^(mu/5 + 1) pc, definition); written as 10 000
    # mmag it was read as 10 000 mag and the row rejected. Its error without a unit is in the
    # modulus's unit; an apparent modulus in mmag loses A_V = R_V E(B-V) in mag
    t = Table({"name": ["Inv A", "Inv B", "Inv C"], "l": [10.0, 20, 30], "b": [0.0, 1, -1], "ebv": [0.3, 0.4, 0.5],
               "e_ebv": [0.02, 0.02, 0.02], "dm": [10000.0, 11500, 9000] * u.mmag, "e_dm": [100.0, 150, 80]})
    tr = read_tracers(t, columns={"distance_modulus": "dm"})
    np.testing.assert_allclose(np.asarray(tr.distance), 10 ** (np.array([10.0, 11.5, 9.0]) / 5 + 1))
    # d(ln d) = ln(10) / 5 d(mu) (common practice): 0.1 mag -> 4.6%
    np.testing.assert_allclose(np.asarray(tr.distance_err) / np.asarray(tr.distance),
                               np.log(10) / 5 * np.array([0.1, 0.15, 0.08]), rtol=1e-6)
    app = Table({**{k: t[k] for k in ("name", "l", "b", "ebv", "e_ebv")}, "Vmod": [10930.0, 12740, 10550] * u.mmag})
    tr = read_tracers(app, columns={"apparent_modulus": "Vmod"}, rv=3.1)
    np.testing.assert_allclose(np.asarray(tr.distance), 10 ** ((np.array([10.93, 12.74, 10.55]) - 3.1 * np.array(
        [0.3, 0.4, 0.5])) / 5 + 1), rtol=1e-9)


def test_an_excess_column_named_red_band_first_is_refused_with_the_fix():
    # E(RP-BP) is negative for any dust (common practice: excesses are bluer minus redder band):
    # read as given, every A_V would be negative; the reader names the column and the fix, and
    # the fix gives the A_V of E(BP-RP)
    t = Table({"name": ["Inv A", "Inv B", "Inv C"], "l": [10.0, 20, 30], "b": [0.0, 1, -1],
               "distance": [1200.0, 800, 2300] * u.pc, "E(RP-BP)": [0.4, 0.5, 0.6]})
    with pytest.raises(CatalogError, match=r"Column 'E\(RP-BP\)'.*excess_color=\('BP', 'RP'\)"):
        _quiet(read_tracers, t)
    from dustkit.bands import excess_to_av

    fixed = _quiet(read_tracers, t, excess_color=("BP", "RP"))
    want, _ = excess_to_av(np.array([0.4, 0.5, 0.6]), None, "BP", "RP")
    np.testing.assert_allclose(np.asarray(fixed.av), want, rtol=1e-9)


def _two_compilations(ebv, ebv_err):
    """One invented cluster ('Corvane 7') listed by two compilations under one name, centres 2 arcmin
    apart, with the same distance and the given E(B-V) values; and an unrelated cluster."""
    return Table({"name": ["Corvane 7", "Corvane 7", "Tesk 2"], "l": [30.0, 30.0 + 2.0 / 60.0, 40.0],
                  "b": [1.0, 1.0, 2.0], "dist": [1000.0, 1000.0, 2000.0] * u.pc,
                  "e_dist": [50.0, 50.0, 100.0] * u.pc, "ebv": [ebv[0], ebv[1], 0.3],
                  "e_ebv": [ebv_err[0], ebv_err[1], 0.03]})


def test_disagreeing_measurements_have_their_merged_error_scaled_up():
    # Particle Data Group, Review of Particle Physics, "Introduction", averaging procedure (from memory):
    # the error of a weighted mean of N measurements is scaled by S = sqrt(chi2 / (N - 1)) when S > 1,
    # chi2 = sum w_i (x_i - xbar)^2. E(B-V) 0.50 +- 0.03 and 0.62 +- 0.03: xbar = 0.56, chi2 = 8, S = sqrt(8),
    # error 0.03 / sqrt(2) * sqrt(8) = 0.060 (not the 0.021 that the disagreeing values do not support)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        ts = read_tracers(_two_compilations((0.50, 0.62), (0.03, 0.03)))
    assert len(ts) == 2
    assert ts.excess[0] == pytest.approx(0.56, rel=1e-12)  # the mean keeps the quoted weights
    assert ts.excess_err[0] == pytest.approx(0.060, rel=1e-12)
    assert ts.av_err[0] == pytest.approx(3.1 * 0.060, rel=1e-12)  # A_V = 3.1 E(B-V): the same S
    assert ts.distance_err[0] == pytest.approx(50.0 / np.sqrt(2), rel=1e-12)  # equal distances: not scaled
    assert ts.meta["n_scaled_groups"] == 1
    said = [str(w.message) for w in record if issubclass(w.category, DuplicatesWarning)]
    assert len(said) == 1
    assert "the errors of 1 group scaled up by S = sqrt(chi2 / (N - 1)) (largest 2.83)" in said[0]
    assert "disagree" in said[0]
    assert "errors of 1 scaled up, their values disagree" in ts.summary()


def test_agreeing_measurements_keep_the_inverse_variance_error():
    # the same two compilations agreeing within their errors: chi2 = 0.02^2 / (2 * 0.03^2) = 0.22 < N - 1 = 1,
    # so S = sqrt(0.22) < 1 and the error is not scaled (S is never below 1: Particle Data Group averaging,
    # from memory): sigma = (sum w)^-1/2 = 0.03 / sqrt(2)
    with pytest.warns(DuplicatesWarning, match=r"no group's errors scaled up"):
        ts = read_tracers(_two_compilations((0.50, 0.52), (0.03, 0.03)))
    assert ts.excess[0] == pytest.approx(0.51, rel=1e-12)
    assert ts.excess_err[0] == pytest.approx(0.03 / np.sqrt(2), rel=1e-12)
    assert ts.meta["n_scaled_groups"] == 0
    # exact copies are one measurement: N = 1, nothing to scale, the error as quoted
    t = _two_compilations((0.50, 0.62), (0.03, 0.03))
    copies = vstack([t, t])
    with pytest.warns(DuplicatesWarning):
        tc = read_tracers(copies)
    assert len(tc) == 2 and tc.excess_err[0] == pytest.approx(0.060, rel=1e-12)
    assert tc.excess_err[1] == pytest.approx(0.03, rel=1e-12) and tc.meta["n_scaled_groups"] == 1


def test_scaled_merge_of_merged_parts_equals_merging_all_rows():
    from dustkit.tracers.duplicates import merge_measurements

    # chi2 about the mean of a union = the parts' own chi2 + sum W_g (xbar_g - xbar)^2 (the decomposition of
    # a weighted sum of squares, common practice): merging two merged halves, each with its unscaled error,
    # chi2 and N, gives the mean and scaled error of merging the four measurements at once
    x, s = np.array([1.0, 1.4, 0.7, 1.9]), np.array([0.1, 0.2, 0.15, 0.1])
    def fields(x, s):
        return {"l": np.full(x.size, 10.0), "b": np.full(x.size, 1.0), "distance": x * 1000, "distance_err": s * 1000,
                "av": x, "av_err": s}
    whole = merge_measurements(fields(x, s), np.zeros(4, int), np.array([0]), np.ones(4))
    halves = merge_measurements(fields(x, s), np.array([0, 0, 1, 1]), np.array([0, 2]), np.ones(4))
    parts = {q: halves["scatter"][q] for q in ("distance", "av")}
    again = merge_measurements(fields(halves["av"], halves["av_err"]), np.zeros(2, int), np.array([0]), np.ones(2),
                               parts=parts)
    assert again["av"][0] == pytest.approx(whole["av"][0], rel=1e-12)
    assert again["av_err"][0] == pytest.approx(whole["av_err"][0], rel=1e-12)
    assert again["distance_err"][0] == pytest.approx(whole["distance_err"][0], rel=1e-12)
    w = 1 / s**2
    mean = np.sum(w * x) / w.sum()
    assert whole["av_err"][0] == pytest.approx(np.sqrt(np.sum(w * (x - mean) ** 2) / 3 / w.sum()), rel=1e-12)
    assert whole["av_err"][0] > w.sum() ** -0.5  # these four disagree: scaled up


def test_scaled_errors_keep_the_correlation_and_the_skew_of_asymmetric_errors():
    from dustkit.tracers.duplicates import merge_groups

    # two parallax distances of one invented star that disagree (1000 +- 100 and 1300 +- 50 pc: mean 1240 pc, chi2 = 7.2):
    # the distance error is scaled by S_d = sqrt(chi2 / (N - 1)) (Particle Data Group averaging, from memory);
    # scaling a variance by S_d^2 and the covariance by S_AV S_d keeps the correlation coefficient (common
    # practice), and the asymmetric errors stay the scaled sigma times the members' mean skew (low + high = 2 sigma)
    sa, sd, rho = np.array([0.1, 0.1]), np.array([100.0, 50.0]), np.array([-0.8, -0.4])
    fields = {"l": np.array([10.0, 10.0]), "b": np.array([1.0, 1.0]), "distance": np.array([1000.0, 1300.0]),
              "distance_err": sd, "av": np.array([1.0, 1.02]), "av_err": sa, "excess": np.array([1.0, 1.02]),
              "excess_err": sa, "av_distance_corr": rho,
              "distance_err_low": np.array([80.0, 45.0]), "distance_err_high": np.array([120.0, 55.0])}
    keep, merged, _ = merge_groups(np.array([0, 0]), np.zeros(2, bool), np.zeros(2, bool), fields, np.arange(2), None)
    wa, wd = 1 / sa**2, 1 / sd**2
    dbar = np.sum(wd * fields["distance"]) / wd.sum()
    s_d = np.sqrt(np.sum(wd * (fields["distance"] - dbar) ** 2) / (2 - 1))
    assert s_d == pytest.approx(np.sqrt(7.2), rel=1e-12)
    sig_d = s_d * wd.sum() ** -0.5
    assert merged["distance"][0] == pytest.approx(dbar, rel=1e-12)
    assert merged["distance_err"][0] == pytest.approx(sig_d, rel=1e-12)
    assert merged["av_err"][0] == pytest.approx(wa.sum() ** -0.5, rel=1e-12)  # A_V agrees: not scaled
    cov = np.sum(wa * wd * rho * sa * sd) / (wa.sum() * wd.sum())
    assert merged["av_distance_corr"][0] == pytest.approx(cov * np.sqrt(wa.sum() * wd.sum()), rel=1e-12)
    r_low = np.sum(wd * fields["distance_err_low"] / sd) / wd.sum()
    assert merged["distance_err_low"][0] == pytest.approx(r_low * sig_d, rel=1e-12)
    assert merged["distance_err_low"][0] + merged["distance_err_high"][0] == pytest.approx(2 * sig_d, rel=1e-12)
    # what a later merge across chunks needs: the unscaled error, chi2 and N of each quantity
    unscaled, chi2, n = merged["scatter"]["distance"]
    assert (unscaled[0], chi2[0], n[0]) == (pytest.approx(wd.sum() ** -0.5), pytest.approx(7.2), 2)


@pytest.mark.parametrize("zp", [np.nan * u.mas, np.inf * u.mas, 1e9 * u.mas, 20 * u.mas, np.nan])
def test_a_parallax_zero_point_that_is_no_zero_point_is_refused(zp):
    # Gaia's zero points are some -0.02 mas (Lindegren et al. 2021, A&A 649, A4): a NaN, an infinity or
    # 20 mas is a typo, refused as the Quantity and the bare number alike (a Quantity used to pass unchecked)
    t = Table({"l": [10.0], "b": [0.0], "parallax": [1.0] * u.mas, "parallax_error": [0.02] * u.mas,
               "ebv": [0.5], "ebv_err": [0.02]})
    with pytest.raises(ParameterError, match="'parallax_zero_point' parameter must be a real number in"):
        read_tracers(t, parallax_zero_point=zp)


def test_an_impossible_source_temperature_is_refused_under_its_own_name():
    t = _ebprp_catalogue({"other": [1.0, 2.0]})
    with pytest.raises(ParameterError, match=r"The 'source_temperature' parameter must be a blackbody temperature "
                                             r"between 2000 and 100000 K\. Got -5\.0 instead"):
        read_tracers(t, source_temperature=-5 * u.K)


# ======================================================================================
# Errors, units and values as real compilations write them (reading audit)
# ======================================================================================


def test_percentage_errors_from_a_unit_are_relative_to_the_value(tmp_path):
    # an error column with the unit '%' (astropy units: 1 % = 0.01, dimensionless) holds a percentage of the
    # value; it was read in the value's unit: a 10 % distance error became 10 pc, a 10 % parallax error 10 mas
    t = _catalogue(n=4)
    t["Dist"] = [1000.0, 2000.0, 3000.0, 4000.0] * u.pc
    t["e_Dist"] = [10.0, 20.0, 5.0, 10.0] * u.percent
    t["e_EBV"] = [10.0, 10.0, 20.0, 50.0] * u.percent
    t["EBV"] = [0.5, 1.0, 1.0, 0.2] * u.mag
    path = tmp_path / "percent.ecsv"
    t.write(path)
    ts = _quiet(read_tracers, path, duplicates="keep", rv=3.1)
    np.testing.assert_allclose(ts.distance_err, [100.0, 400.0, 150.0, 400.0], rtol=1e-12)
    np.testing.assert_allclose(ts.av_err, 3.1 * np.array([0.05, 0.1, 0.2, 0.1]), rtol=1e-12)  # A_V = R_V E(B-V)
    p = Table({"l": [10.0, 20.0], "b": [1.0, 2.0], "plx": [2.0, 1.0] * u.mas, "e_plx": [5.0, 5.0] * u.percent,
               "ebv": [0.3, 0.4]})
    tp = _quiet(read_targets, p)
    # d = 1000 / parallax, sigma_d = 1000 sigma_plx / plx^2 (first-order propagation, common practice)
    np.testing.assert_allclose(tp.distance_err, [1000 * 0.1 / 4.0, 1000 * 0.05 / 1.0], rtol=1e-12)


@pytest.mark.parametrize("name,scale", [("e_Dist(%)", 0.01), ("Dist_err_pct", 0.01), ("e_Dist_percent", 0.01),
                                        ("Dist_fracerr", 1.0), ("Dist_relerr", 1.0)])
def test_error_names_that_say_percent_or_fraction_are_relative_and_announced(name, scale):
    # common practice: compilations name relative errors 'e_Dist(%)', 'dist_err_pct', 'dist_relerr'; read as
    # absolute, 10 (percent) became a 10 pc error at 2.5 kpc, or the column was not found at all
    t = Table({"l": [10.0, 20.0], "b": [1.0, 2.0], "Dist": [2500.0, 1000.0] * u.pc, name: [10.0, 20.0],
               "ebv": [0.3, 0.4]})
    t[name] = np.array([10.0, 20.0]) * (0.01 / scale)
    with pytest.warns(AssumptionWarning, match=rf"Error column '{re.escape(name)}' read as .* of the value in 'Dist'"):
        ts = read_tracers(t, duplicates="keep")
    np.testing.assert_allclose(ts.distance_err, [250.0, 200.0], rtol=1e-12)
    assert ts.meta["columns"]["distance_err"] == name


def test_lower_and_upper_error_columns_are_averaged():
    # VizieR writes asymmetric errors as e_X (lower) and E_X (upper) (common practice); dustkit took whichever
    # came first, so the same catalogue gave different errors depending on the column order
    for order in (("e_Dist", "E_Dist"), ("E_Dist", "e_Dist")):
        t = Table({"l": [10.0, 20.0], "b": [1.0, 2.0], "Dist": [2500.0, 1000.0] * u.pc})
        errs = {"e_Dist": [100.0, 50.0], "E_Dist": [300.0, np.nan]}
        for c in order:
            t[c] = errs[c] * u.pc
        t["ebv"] = [0.3, 0.4]
        t["ebv_err_lo"], t["ebv_err_hi"] = [0.01, 0.02], [0.03, 0.04]
        ts = _quiet(read_tracers, t, duplicates="keep", rv=3.1)
        np.testing.assert_allclose(ts.distance_err, [200.0, 50.0], rtol=1e-12)  # the one given where one is empty
        np.testing.assert_allclose(ts.av_err, [3.1 * 0.02, 3.1 * 0.03], rtol=1e-12)
        assert ts.meta["columns"]["distance_err_high"] == "E_Dist"
        assert any("mean" in a for a in ts.meta["assumptions"])


def test_a_unit_at_the_end_of_a_distance_columns_name_is_the_unit_it_names():
    # 'dist_Mpc' ended in 'pc' and was read as pc (1.2e-3 "pc"); astropy units: 1 Mpc = 1e6 pc, 1 lyr = 0.3066 pc
    t = Table({"l": [10.0, 20.0], "b": [1.0, 2.0], "dist_Mpc": [0.0012, 0.0025], "dist_ly": [3261.6, 8154.0],
               "ebv": [0.3, 0.4]})
    ts = _quiet(read_tracers, t, columns={"distance": "dist_Mpc"})
    np.testing.assert_allclose(ts.distance, [1200.0, 2500.0], rtol=1e-12)
    ts = _quiet(read_tracers, t, columns={"distance": "dist_ly"})
    np.testing.assert_allclose(ts.distance, (np.array([3261.6, 8154.0]) * u.lyr).to_value(u.pc), rtol=1e-12)


def test_a_parallax_far_below_zero_is_rejected_and_counted():
    # -99 (a 'no value' number) with an error of 0.1 mas was placed by the prior at 116 kpc, silently. A true
    # parallax is positive: more than 5 errors below zero is no measurement (Gaussian odds < 1e-6; common practice)
    t = Table({"l": [10.0, 20.0, 30.0, 40.0], "b": [1.0, 2.0, 3.0, 4.0],
               "plx": [0.8, -0.2, -99.0, -0.6] * u.mas, "e_plx": [0.05, 0.1, 0.1, 0.1] * u.mas,
               "ebv": [0.3, 0.4, 0.5, 0.6]})
    with pytest.warns(RowsRejectedWarning, match=r"2 of 4 rows rejected: 2 parallax more than 5 of its errors below 0"):
        ts = read_tracers(t)
    assert list(ts.row) == [0, 1]  # -0.2 +- 0.1 is noise around a small parallax: kept with a prior distance
    assert list(ts.rejected["value"]) == ["-99", "-0.6"]


def test_bare_parallaxes_in_arcsec_stop_the_read_with_the_fix():
    # parallaxes in arcsec without a unit (older compilations; 1 arcsec = 1000 mas, astropy units) were read
    # as mas and put every tracer 2-3 kpc away by the prior, with only 'assuming mas' said
    t = Table({"l": [10.0, 20.0, 30.0], "b": [1.0, 2.0, 3.0], "plx": [0.0008, 0.0004, 0.0012],
               "e_plx": [0.00005, 0.00004, 0.0001], "ebv": [0.3, 0.4, 0.5]})
    with pytest.raises(CatalogError, match=r"'plx'.*no unit.*median size of 0\.0008.*arcsec.*unit arcsec"):
        _quiet(read_tracers, t)
    with pytest.raises(CatalogError, match=r"half the targets"):
        _quiet(read_targets, t)
    t["plx"].unit = t["e_plx"].unit = u.arcsec
    tp = _quiet(read_targets, t)
    np.testing.assert_allclose(tp.distance, [1250.0, 2500.0, 1000.0 / 1.2], rtol=1e-12)  # d = 1 / parallax


def test_sexagesimal_units_of_a_votable_read_as_hours_and_degrees(tmp_path):
    # VizieR's VOTables give sexagesimal positions the units 'h:m:s' and 'd:m:s' (common practice); the
    # declination's 'd:m:s' stopped the read ("not an angle")
    c = SkyCoord(ra=[83.25, 201.7] * u.deg, dec=[-5.5, 33.125] * u.deg)
    t = Table({"RAJ2000": c.ra.to_string(unit=u.hour, sep=":", precision=3),
               "DEJ2000": c.dec.to_string(unit=u.deg, sep=":", precision=2, alwayssign=True),
               "Dist": [1200.0, 2500.0] * u.pc, "EBV": [0.3, 0.5]})
    t["RAJ2000"].unit, t["DEJ2000"].unit = "h:m:s", "d:m:s"
    path = tmp_path / "sexagesimal.vot"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # astropy: 'h:m:s' is not a VOUnit
        t.write(path, format="votable")
    ts = _quiet(read_tracers, path)
    gal = c.galactic  # astropy.coordinates
    np.testing.assert_allclose(ts.l, gal.l.deg, atol=1e-5)
    np.testing.assert_allclose(ts.b, gal.b.deg, atol=1e-5)


def test_a_modulus_error_in_millimag_is_converted():
    # the modulus error's unit was ignored: 50 mmag read as 50 mag; sigma_d = d ln(10) / 5 sigma_mu
    t = Table({"l": [10.0], "b": [1.0], "mu0": [10.0] * u.mag, "e_mu0": [50.0] * u.mmag, "ebv": [0.3]})
    ts = _quiet(read_tracers, t)
    np.testing.assert_allclose(ts.distance_err, 1000.0 * np.log(10) / 5 * 0.05, rtol=1e-12)
    t["mu0"].unit = u.pc
    with pytest.raises(CatalogError, match=r"'mu0'.*'pc'.*not a magnitude \(a distance modulus is in mag\)"):
        _quiet(read_tracers, t)


def _fk4_reference(ra, dec):
    # astropy.coordinates: FK4 B1950 -> Galactic
    from astropy.coordinates import FK4

    gal = SkyCoord(ra=ra * u.deg, dec=dec * u.deg, frame=FK4(equinox="B1950")).galactic
    return gal.l.deg, gal.b.deg


def test_b1950_positions_are_read_in_fk4_from_names_fits_keywords_and_votable_coosys(tmp_path):
    # B1950 positions read as ICRS land 0.3-0.7 deg off (50 years of precession); they were read so silently
    ra, dec = np.array([270.1, 83.2]), np.array([-24.3, 22.0])
    want_l, want_b = _fk4_reference(ra, dec)
    base = {"Dist": [1500.0, 2500.0] * u.pc, "EBV": [0.4, 0.6]}
    named = Table({"RAB1950": ra, "DEB1950": dec, **base})  # recognised, and read as FK4 B1950
    fits_path = tmp_path / "equinox.fits"
    t = Table({"RA": ra, "DEC": dec, **base})
    t.meta["EQUINOX"] = 1950.0  # FITS standard 4.0 sec 8.1: RADESYS defaults to FK4 for EQUINOX < 1984 (from memory)
    t.write(fits_path)
    parquet_path = tmp_path / "equinox.parquet"  # astropy keeps the table's meta in the Parquet metadata
    t.write(parquet_path)
    vot_path = tmp_path / "coosys.xml"
    rows = "".join(f"<TR><TD>{r}</TD><TD>{d}</TD><TD>{x}</TD><TD>{e}</TD></TR>" for r, d, x, e in
                   zip(ra, dec, [1500.0, 2500.0], [0.4, 0.6]))
    vot_path.write_text(  # VOTable 1.4 sec 3.3: a FIELD's ref names the COOSYS of its coordinates
        '<?xml version="1.0"?><VOTABLE version="1.4" xmlns="http://www.ivoa.net/xml/VOTable/v1.3"><RESOURCE>'
        '<COOSYS ID="old" system="eq_FK4" equinox="B1950"/><TABLE>'
        '<FIELD name="RA" datatype="double" unit="deg" ref="old"/><FIELD name="Dec" datatype="double" unit="deg" '
        'ref="old"/><FIELD name="Dist" datatype="double" unit="pc"/><FIELD name="EBV" datatype="double" unit="mag"/>'
        f"<DATA><TABLEDATA>{rows}</TABLEDATA></DATA></TABLE></RESOURCE></VOTABLE>")
    for source, said in ((named, "column names say B1950"), (fits_path, "EQUINOX = 1950.0"),
                         (parquet_path, "EQUINOX = 1950.0"), (vot_path, "COOSYS of the columns")):
        with pytest.warns(AssumptionWarning, match=rf"read as FK4 B1950 \(.*{said}"):
            ts = _quiet_but(AssumptionWarning, read_tracers, source)
        np.testing.assert_allclose(ts.l, want_l, atol=1e-6)
        np.testing.assert_allclose(ts.b, want_b, atol=1e-6)
    # the chunked reads of out-of-core builds keep the header's frame too
    from dustkit.tracers.chunks import Chunk, chunk_tracers

    reading = dict(columns=None, distance_unit=None, law="ccm89", rv=3.1, parallax_zero_point=0.0,
                   default_distance_frac_err=0.1, default_excess_err=0.05, reject_limits=None, excess_color=None)
    fields, _, _ = chunk_tracers(Chunk("fits", str(fits_path), 0, 2, 0), reading)
    np.testing.assert_allclose(fields["l"], want_l, atol=1e-6)
    fields, _, _ = chunk_tracers(Chunk("parquet", str(parquet_path), 0, 2, 0, row_groups=(0,)), reading)
    np.testing.assert_allclose(fields["l"], want_l, atol=1e-6)
    # J2000 / ICRS files are unchanged: an EQUINOX of 2000 is FK5 J2000, taken as ICRS
    t.meta["EQUINOX"] = 2000.0
    t.write(fits_path, overwrite=True)
    ts = _quiet(read_tracers, fits_path)
    icrs = SkyCoord(ra=ra * u.deg, dec=dec * u.deg, frame="icrs").galactic
    np.testing.assert_allclose(ts.l, icrs.l.deg, atol=1e-9)
    assert any("taken as ICRS" in a for a in ts.meta["assumptions"])


def _quiet_but(kind, func, *args, **kwargs):
    """Call ``func`` with dustkit's warnings silenced except ``kind`` (for tests that check one warning)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RowsRejectedWarning)
        warnings.simplefilter("always", kind)
        return func(*args, **kwargs)


@pytest.mark.parametrize("sep,suffix", [(",", ".csv"), ("\t", ".tsv")])
def test_a_units_line_under_the_header_gives_the_units(tmp_path, sep, suffix):
    # a line of units under the header, and a rule of dashes (VizieR's TSV files, many compilations; common
    # practice), became rejected rows and the units were lost: 'kpc' distances then stopped the read as pc
    lines = [["_Glon", "_Glat", "Dist", "E(B-V)", "plx"], ['"deg"', '"deg"', "kpc", "mag", "arcsec"],
             ["-----", "-----", "----", "------", "---"], ["12.1", "0.5", "1.2", "0.30", "0.0008"],
             ["45.3", "-1.2", "2.5", "0.80", ""]]
    path = tmp_path / f"units_line{suffix}"
    path.write_text("\n".join(sep.join(x) for x in lines) + "\n")
    with pytest.warns(AssumptionWarning, match=r"first line under the header as the columns' units .*'Dist': 'kpc'"):
        ts = _quiet_but(AssumptionWarning, read_tracers, path, columns={"distance": "Dist"})
    assert len(ts) == 2 and len(ts.rejected) == 0 and list(ts.row) == [0, 1]  # rows counted after the units
    np.testing.assert_allclose(ts.distance, [1200.0, 2500.0], rtol=1e-12)  # 1 kpc = 1000 pc (astropy units)
    np.testing.assert_allclose(ts.av, [0.93, 2.48], rtol=1e-12)  # A_V = 3.1 E(B-V)
    tp = _quiet(read_targets, path, columns={"parallax": "plx"})
    np.testing.assert_allclose(tp.distance, [1250.0, np.nan], rtol=1e-12)  # 0.0008 arcsec = 0.8 mas
    # a first row of numbers is data, as before
    path.write_text("\n".join(sep.join(x) for x in [lines[0][:4], lines[3][:4]]) + "\n")
    ts = _quiet(read_tracers, path, distance_unit="kpc")
    assert len(ts) == 1 and not any("units" in a for a in ts.meta["assumptions"])


def test_a_header_naming_a_column_twice_is_announced(tmp_path):
    # common practice: astropy names a repeated header name 'EBV_1' and reads on; which 'EBV' was used went unsaid
    path = tmp_path / "twice.csv"
    path.write_text("l,b,Dist,EBV,EBV\n12.1,0.5,1200,0.3,0.5\n45.3,-1.2,2500,0.8,0.9\n")
    with pytest.warns(AssumptionWarning, match=r"'EBV' is read as ebv, and a column 'EBV_1' is also present"):
        ts = _quiet_but(AssumptionWarning, read_tracers, path)
    np.testing.assert_allclose(ts.av, [0.93, 2.48], rtol=1e-12)  # the first, as said
