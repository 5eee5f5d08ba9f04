"""Tests of dustkit.laws against published tables and an independent library.

Every check value below is copied here with its source; nothing is read from outside
the repository at test time.
"""

import numpy as np
import pytest
from astropy import units as u
from astropy.table import Table
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from dustkit._errors import LawRangeError, ParameterError
from dustkit.laws import DEFAULT_LAW, LAWS, Law, get_law, list_laws

extinction = pytest.importorskip("extinction")

# x = 1/lambda [1/micron] of the U B V R I J H K points of CCM89 Table 3
X_BANDS = np.array([2.78, 2.27, 1.82, 1.43, 1.11, 0.80, 0.63, 0.46])


# --------------------------------------------------------------------------- CCM89
def test_ccm89_published_formula_values():
    # computed from the published formula of Cardelli, Clayton & Mathis 1989
    # (ApJ 345, 245), R_V = 3.1; tolerance 1e-4
    expected = [1.5688, 1.3226, 1.0000, 0.7513, 0.4780, 0.2821, 0.1920, 0.1157]
    got = get_law("ccm89").a_over_av(X_BANDS / u.micron, rv=3.1)
    np.testing.assert_allclose(got, expected, atol=1e-4)


def test_ccm89_against_printed_table3_and_b_band_misprint():
    # Cardelli, Clayton & Mathis 1989, Table 3 (R_V = 3.1): U 1.569, R 0.751, I 0.479,
    # J 0.282, H 0.190, K 0.114; tolerance vs the printed table 0.01
    law = get_law("ccm89")
    x = np.array([2.78, 1.43, 1.11, 0.80, 0.63, 0.46])
    printed = [1.569, 0.751, 0.479, 0.282, 0.190, 0.114]
    np.testing.assert_allclose(law.a_over_av(x / u.micron, 3.1), printed, atol=0.01)
    # CCM89 Table 3 prints 1.337 for B (x = 2.27): a known misprint, the formula
    # gives 1.322 (= 1 + 1/R_V, see the exact property below)
    b_value = float(law.a_over_av(2.27 / u.micron, 3.1))
    assert abs(b_value - 1.322) < 1e-3
    assert abs(b_value - 1.337) > 0.01


@pytest.mark.parametrize("rv", np.linspace(2.0, 6.0, 9))
def test_ccm89_b_over_v_is_one_plus_inverse_rv(rv):
    # CCM89 property by construction: A(x=2.27)/A(x=1.82) = 1 + 1/R_V to ~3e-6
    # (computed; also in the dust_extinction package's tests)
    law = get_law("ccm89")
    a_b, a_v = law.a_over_av(np.array([2.27, 1.82]) / u.micron, rv=rv)
    assert a_b / a_v == pytest.approx(1 + 1 / rv, abs=5e-6)


# -------------------------------------------------------------------- O'Donnell 94
def test_odonnell94_published_formula_values():
    # computed from O'Donnell 1994 (ApJ 422, 158) formula, R_V = 3.1; tolerance 1e-4
    expected = [1.5588, 1.3207, 1.0000, 0.7547, 0.4781, 0.2821, 0.1920, 0.1157]
    got = get_law("odonnell94").a_over_av(X_BANDS / u.micron, rv=3.1)
    np.testing.assert_allclose(got, expected, atol=1e-4)


def test_odonnell94_against_schlegel_finkbeiner_davis_table6():
    # Schlegel, Finkbeiner & Davis 1998 (ApJ 500, 525) Table 6: O94 with R_V = 3.1,
    # A/A_V at the effective wavelengths of Landolt U B V R I and UKIRT J H K; rtol 0.005
    wavelength = np.array([3372, 4404, 5428, 6509, 8090, 12660, 16732, 22152]) * u.AA
    sfd_table6 = [1.664, 1.321, 1.015, 0.819, 0.594, 0.276, 0.176, 0.112]
    got = get_law("odonnell94").a_over_av(wavelength, rv=3.1)
    np.testing.assert_allclose(got, sfd_table6, rtol=0.005)


# ------------------------------------------------------------------ Fitzpatrick 99
def test_fitzpatrick99_published_formula_values():
    # computed from Fitzpatrick 1999 (PASP 111, 63), R_V = 3.1; tolerance 1e-4.
    # F99's R_V refers to broad-band photometry, so x = 1.82 gives 0.979, not 1.
    expected = [1.5460, 1.3078, 0.9793, 0.6892, 0.4517, 0.2567, 0.1751, 0.1110]
    got = get_law("fitzpatrick99").a_over_av(X_BANDS / u.micron, rv=3.1)
    np.testing.assert_allclose(got, expected, atol=1e-4)


def test_fitzpatrick99_table3_a_over_ebv():
    # Fitzpatrick 1999 (PASP 111, 63) Table 3: A/E(B-V) at R_V = 3.1; atol 1e-3
    x = np.array([0.377, 0.820, 1.667, 1.828, 2.141, 2.433, 3.704, 3.846])
    table3 = [0.265, 0.829, 2.688, 3.055, 3.806, 4.315, 6.265, 6.591]
    got = get_law("fitzpatrick99").a_over_av(x / u.micron, rv=3.1) * 3.1
    np.testing.assert_allclose(got, table3, atol=1e-3)


# --------------------------------------------------------------- Rieke & Lebofsky 85
def test_rieke85_near_infrared_ratios():
    # Rieke & Lebofsky 1985 (ApJ 288, 618), Table 3, R = 3.09, A/A_V:
    # J 1.25 um 0.282, H 1.65 um 0.175, K 2.22 um 0.112, L 3.5 um 0.058, M 4.8 um 0.023
    law = get_law("rieke85")
    wavelength = np.array([1.25, 1.65, 2.22, 3.5, 4.8]) * u.micron
    np.testing.assert_allclose(law.a_over_av(wavelength), [0.282, 0.175, 0.112, 0.058, 0.023], atol=1e-6)


def test_rieke85_is_fixed_rv_and_interpolates_log_log():
    law = get_law("rieke85")
    assert law.rv_fixed and law.rv_range == (3.09, 3.09)  # Rieke & Lebofsky 1985: R = 3.09
    assert "fixed" in list_laws()[list(LAWS).index("rieke85")]["notes"]
    # log-log interpolation: at the geometric mean of J and H the ratio is the
    # geometric mean of the table values (Rieke & Lebofsky 1985 Table 3: 0.282, 0.175)
    mid = float(law.a_over_av(np.sqrt(1.25 * 1.65) * u.micron))
    assert mid == pytest.approx(np.sqrt(0.282 * 0.175), rel=1e-9)
    # B = 1 + 1/R for R = 3.09 (definition of R = A_V / E(B-V))
    assert float(law.a_over_av(0.44 * u.micron)) == pytest.approx(1 + 1 / 3.09, abs=1e-3)
    # R_V within the paper's quoted uncertainty is accepted, others are not
    assert float(law.a_over_av(2.22 * u.micron, rv=3.1)) == pytest.approx(0.112)
    assert float(law.a_over_av(2.22 * u.micron, rv=None)) == pytest.approx(0.112)
    with pytest.raises(LawRangeError, match=r"rieke85.*3\.09.*Got R_V = 3\.5"):
        law.a_over_av(2.22 * u.micron, rv=3.5)
    # valid only inside the table: nothing beyond M (4.8 um)
    with pytest.raises(LawRangeError, match="rieke85"):
        law.a_over_av(5.0 * u.micron)


def test_rieke85_consistent_with_ccm89_in_optical_and_near_infrared():
    # CCM89 used Rieke & Lebofsky 1985 for its infrared part: the two agree to a few
    # per cent from U to K (common practice)
    wavelength = np.array([0.365, 0.44, 0.55, 0.70, 0.90, 1.25, 1.65, 2.22]) * u.micron
    rl = get_law("rieke85").a_over_av(wavelength)
    ccm = get_law("ccm89").a_over_av(wavelength, rv=3.1)
    np.testing.assert_allclose(rl, ccm, rtol=0.035)


# ------------------------------------------------------------------------- Gordon 23
def test_gordon23_close_to_ccm89_in_optical():
    # Modern Milky Way averages differ from CCM89 by a few per cent in the optical
    # (common practice); G23 at the V point is 1 within 0.1 % (Gordon et al. 2023
    # normalise to A_V)
    law = get_law("gordon23")
    wavelength = np.geomspace(0.36, 1.0, 30) * u.micron
    np.testing.assert_allclose(law.a_over_av(wavelength), get_law("ccm89").a_over_av(wavelength), rtol=0.05)
    assert float(law.a_over_av(0.55 * u.micron)) == pytest.approx(1.0, abs=2e-3)
    # far wider range than CCM89: covers WISE-like 4.6 um and 10 um silicate region
    assert law.wavelength_range[1] >= 30 * u.micron
    assert np.all(law.a_over_av(np.array([4.6, 10.0]) * u.micron) > 0)


# ------------------------------------------------- independent `extinction` library
WAVE_AA = np.geomspace(1000.0, 33000.0, 200)


@pytest.mark.parametrize("rv", [2.5, 3.1, 4.0, 5.5])
@pytest.mark.parametrize(
    ("name", "function", "atol"),
    [
        # two independent implementations agree to 1e-6 for CCM89/O94, 1e-3 for F99
        # (reference library: the `extinction` package on PyPI)
        ("ccm89", "ccm89", 1e-6),
        ("odonnell94", "odonnell94", 1e-6),
        ("fitzpatrick99", "fitzpatrick99", 1e-3),
    ],
)
def test_against_extinction_package(name, function, atol, rv):
    ours = get_law(name).a_over_av(WAVE_AA * u.AA, rv=rv)
    theirs = getattr(extinction, function)(WAVE_AA, 1.0, rv)
    np.testing.assert_allclose(ours, theirs, atol=atol)


def test_extinction_package_documented_examples():
    # `extinction` documentation: ccm89([2000, 4000, 8000] A, a_v=1, r_v=3.1) and
    # odonnell94 of the same
    wavelength = np.array([2000.0, 4000.0, 8000.0]) * u.AA
    np.testing.assert_allclose(
        get_law("ccm89").a_over_av(wavelength, 3.1), [2.84252644, 1.4645557, 0.59748901], atol=1e-7
    )
    np.testing.assert_allclose(
        get_law("odonnell94").a_over_av(wavelength, 3.1), [2.84252644, 1.42617802, 0.60793495], atol=1e-7
    )


# --------------------------------------------------------- every registered law
@pytest.mark.parametrize("name", sorted(LAWS))
def test_every_law_declares_its_ranges(name):
    law = LAWS[name]
    assert isinstance(law, Law) and law.name == name
    assert law.title and law.citation
    lo, hi = law.wavelength_range.to_value(u.micron)
    assert 0 < lo < hi
    assert law.rv_range[0] <= law.rv_range[1]
    if law.rv_fixed:
        assert law.rv_default == law.rv_range[0]


@pytest.mark.parametrize("name", sorted(LAWS))
def test_every_law_is_about_one_at_v(name):
    # A_V / A_V = 1 by definition; F99 gives 0.98 at 0.55 um (broad-band R_V)
    law = LAWS[name]
    assert float(law.a_over_av(0.55 * u.micron, rv=None)) == pytest.approx(1.0, abs=0.03)


@pytest.mark.parametrize("name", sorted(LAWS))
def test_every_law_falls_from_optical_to_near_infrared(name):
    # common practice: interstellar extinction decreases with wavelength from V to K
    law = LAWS[name]
    wavelength = np.geomspace(0.55, 2.2, 40) * u.micron
    assert np.all(np.diff(law.a_over_av(wavelength, rv=None)) < 0)


@pytest.mark.parametrize("name", sorted(LAWS))
def test_every_law_rejects_wavelengths_outside_range(name):
    law = LAWS[name]
    lo, hi = law.wavelength_range.to_value(u.micron)
    for bad in (lo * 0.9, hi * 1.1):
        with pytest.raises(LawRangeError) as info:
            law.a_over_av(np.array([0.55, bad]) * u.micron, rv=None)
        message = str(info.value)
        assert name in message
        assert f"{lo:.4g}" in message and f"{hi:.4g}" in message
        assert f"{bad:.4g}" in message
    # the edges themselves are valid
    assert np.all(np.isfinite(law.a_over_av(np.array([lo, hi]) * u.micron, rv=None)))


@pytest.mark.parametrize("name", sorted(LAWS))
def test_every_law_rejects_rv_outside_range(name):
    law = LAWS[name]
    lo, hi = law.rv_range
    for bad in (lo - 0.5, hi + 0.5):
        with pytest.raises(LawRangeError) as info:
            law.a_over_av(0.55 * u.micron, rv=bad)
        message = str(info.value)
        assert name in message and f"{bad:g}" in message and f"{lo:g}" in message
    with pytest.raises(ParameterError, match="'rv' parameter"):
        law.a_over_av(0.55 * u.micron, rv="three")
    with pytest.raises(ParameterError, match="'rv' parameter"):
        law.a_over_av(0.55 * u.micron, rv=np.nan)


@pytest.mark.parametrize("name", sorted(LAWS))
def test_every_law_accepts_any_spectral_unit(name):
    law = LAWS[name]
    lam = np.array([[0.6, 0.8], [1.0, 1.2]]) * u.micron
    reference = law.a_over_av(lam, rv=None)
    assert reference.shape == (2, 2) and reference.dtype == float
    np.testing.assert_allclose(law.a_over_av(lam.to(u.AA), rv=None), reference, rtol=1e-12)
    np.testing.assert_allclose(law.a_over_av(lam.to(u.nm), rv=None), reference, rtol=1e-12)
    np.testing.assert_allclose(law.a_over_av(1 / lam, rv=None), reference, rtol=1e-12)  # wavenumber
    np.testing.assert_allclose(
        law.a_over_av(lam.to(u.THz, equivalencies=u.spectral()), rv=None), reference, rtol=1e-12
    )


@settings(max_examples=40, deadline=None)
@given(x=st.floats(0.3, 2.7), rv=st.floats(2.0, 6.0))
def test_wavenumber_and_wavelength_agree(x, rv):
    # unit equivalence: x [1/micron] and lambda = 1/x [micron] are the same point
    # (away from the piece boundary x = 1.1, see the next test)
    assume(abs(x - 1.1) > 1e-9)
    law = get_law("ccm89")
    assert float(law.a_over_av(x / u.micron, rv)) == pytest.approx(
        float(law.a_over_av((1e4 / x) * u.AA, rv)), rel=1e-12
    )


@pytest.mark.parametrize("rv", [2.0, 3.1, 6.0])
def test_ccm89_pieces_meet_closely_at_x_1_1(rv):
    # CCM89's infrared (x < 1.1) and optical (x >= 1.1) formulas meet only
    # approximately at x = 1.1 1/micron (computed from the published coefficients:
    # a jump below 1e-3 of A_V); values just either side of the boundary differ by
    # that jump and no more
    law = get_law("ccm89")
    below, above = law.a_over_av(np.array([1.1 - 1e-12, 1.1]) / u.micron, rv=rv)
    assert abs(below - above) < 1e-3


# ----------------------------------------------------------- registry and listing
def test_get_law_is_case_insensitive_and_lists_names_when_unknown():
    assert get_law("CCM89") is LAWS["ccm89"]
    assert get_law(" Fitzpatrick99 ") is LAWS["fitzpatrick99"]
    assert get_law(None).name == DEFAULT_LAW == "ccm89"
    assert get_law(LAWS["gordon23"]) is LAWS["gordon23"]
    with pytest.raises(ParameterError) as info:
        get_law("ccm98")
    message = str(info.value)
    assert "'law' parameter" in message and "ccm98" in message
    for name in LAWS:
        assert name in message


def test_list_laws_table():
    table = list_laws()
    assert isinstance(table, Table)
    assert list(table["name"]) == list(LAWS)
    for column in ("name", "citation", "rv_min", "rv_max", "wavelength_min", "wavelength_max"):
        assert column in table.colnames
    assert table["wavelength_min"].unit == u.micron
    row = table[list(table["name"]).index("ccm89")]
    assert row["rv_min"] == 2.0 and row["rv_max"] == 6.0
    assert row["wavelength_max"].to_value(u.micron) == pytest.approx(1 / 0.3)
    assert "Cardelli" in row["citation"]


def test_non_quantity_wavelength_gets_a_hint():
    with pytest.raises(ParameterError, match=r"'wavelength' parameter must be an astropy Quantity.*micron"):
        get_law("ccm89").a_over_av(0.55)
    with pytest.raises(ParameterError, match="'wavelength' parameter"):
        get_law("ccm89").a_over_av(3 * u.kg)
    with pytest.raises(ParameterError, match="positive"):
        get_law("ccm89").a_over_av(np.array([0.5, -1.0]) * u.micron)


def test_fast_on_large_arrays():
    # a_over_av is called on whole catalogues: 10^6 wavelengths should take well under a second
    import time

    lam = np.random.default_rng(1).uniform(0.4, 3.0, 10**6) * u.micron
    start = time.perf_counter()
    values = get_law("ccm89").a_over_av(lam, 3.1)
    assert time.perf_counter() - start < 3.0
    assert values.shape == (10**6,) and np.all(np.isfinite(values))


def test_wavelength_micron_accepts_any_spectral_unit():
    # 5500 A = 0.55 um = 1/0.55 um^-1; c / 0.55 um in Hz (SI definition of c)
    from dustkit.laws import wavelength_micron

    np.testing.assert_allclose(wavelength_micron([5500.0, 11000.0] * u.AA), [0.55, 1.1], rtol=1e-12)
    assert float(wavelength_micron(1.82 / u.micron)) == pytest.approx(1 / 1.82, rel=1e-12)
    assert float(wavelength_micron((299792458.0 / 0.55e-6) * u.Hz)) == pytest.approx(0.55, rel=1e-12)
    with pytest.raises(ParameterError, match="'wavelength' parameter"):
        wavelength_micron(0.55)
    with pytest.raises(ParameterError, match="'band' parameter.*finite and positive"):
        wavelength_micron([-1.0, 1.0] * u.micron, "band")
