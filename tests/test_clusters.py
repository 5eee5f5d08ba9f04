"""Main-sequence fitting (dustkit.clusters): the sequence table, the reddening line, and fits of
simulated clusters with known E(B-V) and mu0.

The synthetic clusters are drawn by ``dustkit.clusters.simulate_members`` from the same
Pecaut & Mamajek (2013) sequence with realistic photometric errors (0.01 mag floor,
0.05 mag at the magnitude limit), 0.02 mag intrinsic scatter, 30% unresolved binaries (the
companion's flux added) and 30% field stars at other distances and reddenings. They are
invented; no real cluster is used.
"""

import json
import math
import warnings

import numpy as np
import pytest
from astropy import units as u
from astropy.table import Table, vstack

from dustkit import read_tracers
from dustkit._errors import AssumptionWarning
from dustkit.bands import get_band, q_method_ebv
from dustkit.clusters import (
    DegeneracyWarning,
    MainSequence,
    default_sequence,
    fit_cluster,
    fit_clusters,
    fit_colour_colour,
    reddening_curve,
    simulate_members,
)


def _quiet_fit(members, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegeneracyWarning)
        return fit_cluster(members, **kw)


# ----------------------------------------------------------------------------- the sequence
def test_sequence_values_from_the_shipped_table():
    seq = default_sequence()
    # the table itself is the source: E. Mamajek's EEM_dwarf_UBVIJHK_colors_Teff.txt
    # (Pecaut & Mamajek 2013, ApJS 208, 9), row G2V: B-V = 0.650, M_V = 4.80, U-B = 0.133
    i = list(seq.spectral_type).index("G2V")
    assert seq._values["V"][i] == pytest.approx(4.80)
    assert seq._values["B"][i] - seq._values["V"][i] == pytest.approx(0.650)
    assert seq._values["U"][i] - seq._values["B"][i] == pytest.approx(0.133)
    # interpolated smoothly in colour: at B-V = 0.65 the sequence gives M_V = 4.80
    assert seq.at_colour("B", "V", 0.65, "V") == pytest.approx(4.80, abs=0.02)
    # A0V colours are zero by the definition of the Johnson system (common practice)
    j = list(seq.spectral_type).index("A0V")
    for blue, red in (("B", "V"), ("U", "B"), ("V", "Ks"), ("J", "H")):
        assert abs(seq._values[blue][j] - seq._values[red][j]) < 0.05
    # source and version are recorded
    assert "Pecaut & Mamajek 2013" in seq.source and "MeanStars" in seq.source
    assert seq.version == "2022.04.16"


def test_user_sequence_table():
    seq = default_sequence()
    p = np.linspace(0.0, 8.0, 30)
    t = Table({"Mv": p, "B-V": seq.colour("B", "V", p), "U-B": seq.colour("U", "B", p)})
    mine = MainSequence(t, source="my own sequence", version="1")
    assert mine.bands == ("U", "B", "V")
    np.testing.assert_allclose(mine.colour("B", "V", [1.0, 5.0]), seq.colour("B", "V", [1.0, 5.0]), atol=0.01)
    members = simulate_members(60, 0.5, 10.0, bands=("U", "B", "V"), absolute_range=(0.5, 7.5), rng=3)
    fit = fit_cluster(members, sequence=t, evolved_cut=None)
    assert fit.sequence_source == "user table" and abs(fit.ebv - 0.5) < 0.03


# ----------------------------------------------------------------------------- reddening line
def test_reddening_line_slope_is_the_laws():
    extinction = pytest.importorskip("extinction")
    ebv, a = reddening_curve(("U", "B", "V"), "ccm89", 3.1)
    small = (ebv > 0) & (ebv < 0.3)
    slope = np.polyfit(ebv[small], (a[:, 0] - a[:, 1])[small], 1)[0]
    # reference library: extinction.ccm89 (Cardelli, Clayton & Mathis 1989) at the bands'
    # effective wavelengths gives E(U-B)/E(B-V)
    lam = np.array([get_band(b).wavelength.to_value(u.AA) for b in ("U", "B", "V")])
    k = extinction.ccm89(lam, 1.0, 3.1)
    assert slope == pytest.approx((k[0] - k[1]) / (k[1] - k[2]), rel=0.05)
    # the slope grows with E(B-V) no less than it starts (monochromatic: constant)
    big = (ebv > 1.5) & (ebv < 2.0)
    assert np.polyfit(ebv[big], (a[:, 0] - a[:, 1])[big], 1)[0] >= slope - 1e-6


def test_q_method_worked_value_agrees_with_the_colour_colour_fit():
    # Johnson & Morgan 1953: Q = (U-B) - 0.72 (B-V); for B-V = 0.30, U-B = -0.40 the
    # Q-method gives E(B-V) = 0.30 - 0.332 * (-0.616) = 0.5045 (dustkit.bands.q_method_ebv)
    ebv_q, _ = q_method_ebv(0.30, -0.40)
    assert ebv_q == pytest.approx(0.5045, abs=1e-4)
    hot = Table({"B-V": np.full(6, 0.30), "e_B-V": np.full(6, 0.01), "U-B": np.full(6, -0.40), "e_U-B": np.full(6, 0.01)})
    fit = fit_colour_colour(hot)
    # the Q-method measures the B-V colour excess of the stars; the fit reports the nominal
    # E(B-V) = A_V / R_V, whose B-V passband excess (the reddening line at fit.ebv) is what the
    # stars show. The slope of CCM89 (0.76) differs a little from Johnson's 0.72: agreement
    # to 0.03 mag
    ebv_line, a = reddening_curve(("B", "V"), "ccm89", 3.1)
    shown = np.interp(fit.ebv, ebv_line, a[:, 0]) - np.interp(fit.ebv, ebv_line, a[:, 1])
    assert shown == pytest.approx(0.5045, abs=0.03)
    assert "colour_colour_only" in fit.flags and math.isnan(fit.distance_modulus)


def test_colour_colour_fit_is_independent_of_distance():
    # a limit no star reaches: at V < 30 the farther copy lost two faint field stars, which moved its
    # E(B-V) by 0.006 mag (within its error, but no longer the same stars)
    near = simulate_members(80, 0.45, 9.0, bands=("U", "B", "V"), magnitude_limit=45, error_at_limit=0.0, rng=21)
    far = simulate_members(80, 0.45, 11.0, bands=("U", "B", "V"), magnitude_limit=45, error_at_limit=0.0, rng=21)
    assert len(near) == len(far)
    a, b = fit_colour_colour(near), fit_colour_colour(far)
    assert a.ebv == pytest.approx(0.45, abs=0.02)
    assert a.ebv == pytest.approx(b.ebv, abs=0.003)  # the same colours (up to rounding of the magnitudes)


# ----------------------------------------------------------------------------- fits
@pytest.mark.parametrize("bands, ebv, mu0, seed", [
    (("U", "B", "V"), 0.55, 10.8, 7),
    (("B", "V", "G", "BP", "RP", "J", "Ks"), 0.85, 11.5, 8),
])
def test_fit_recovers_ebv_and_mu0(bands, ebv, mu0, seed):
    members = simulate_members(120, ebv, mu0, bands=bands, binary_fraction=0.3, field_fraction=0.3, rng=seed)
    fit = fit_cluster(members)
    # acceptance of the issue: E(B-V) within 0.02 mag, mu0 within 0.10 mag
    assert abs(fit.ebv - ebv) < 0.02
    assert abs(fit.distance_modulus - mu0) < 0.10
    assert not fit.degenerate
    assert fit.distance.unit == u.pc
    assert fit.distance.to_value(u.pc) == pytest.approx(10 ** (fit.distance_modulus / 5 + 1))
    assert fit.covariance.shape == (2, 2) and fit.covariance[0, 0] == pytest.approx(fit.ebv_err**2)
    # the field stars get low weights, the members high ones (field stars that happen to lie
    # on the cluster's sequence cannot be told from members)
    w = fit.weights
    assert np.mean(w[members["true_member"]]) > 0.8 and np.mean(w[~members["true_member"]]) < 0.4
    assert 0.1 < fit.binary_fraction < 0.6
    assert fit.sequence_version == "2022.04.16" and fit.law == "ccm89" and fit.rv == 3.1


def test_one_diagram_is_flagged_and_its_error_is_wide():
    members = simulate_members(120, 0.6, 10.5, bands=("B", "V"), rng=4)
    with pytest.warns(DegeneracyWarning, match="U-B.*parallaxes"):
        fit = fit_cluster(members)
    assert fit.degenerate and "ebv_mu0_degenerate" in fit.flags
    # not a falsely small error: at least the 0.05 mag colour systematic of the sequence,
    # and the truth within 3 sigma
    assert fit.ebv_err >= 0.045 and fit.distance_modulus_err >= 0.1
    assert abs(fit.ebv - 0.6) < 3 * fit.ebv_err and abs(fit.distance_modulus - 10.5) < 3 * fit.distance_modulus_err
    # they trade off along the reddening vector: strongly anti-correlated
    assert fit.correlation < -0.8
    # U-B breaks it
    ubv = simulate_members(120, 0.6, 10.5, bands=("U", "B", "V"), rng=4)
    with warnings.catch_warnings():
        warnings.simplefilter("error", DegeneracyWarning)
        assert not fit_cluster(ubv).degenerate


def test_parallaxes_break_the_degeneracy():
    members = simulate_members(100, 0.6, 10.0, bands=("B", "V"), parallax_error=0.05, rng=5)
    members["parallax"] += -0.017  # catalogue parallaxes too small by the zero point (simulated)
    with warnings.catch_warnings():
        warnings.simplefilter("error", DegeneracyWarning)
        fit = fit_cluster(members)
    assert "parallax_prior" in fit.flags and not fit.degenerate
    # 1 kpc: parallax 1 mas +- 0.05/sqrt(70) plus the 0.010 mas floor -> mu0 to about 0.03 mag
    assert abs(fit.distance_modulus - 10.0) < 0.1
    assert fit.distance_modulus_err >= 5 / math.log(10) * 0.010 / 1.0 * 0.9


def test_twice_as_far_adds_5_log10_2():
    # inverse-square law: the same cluster 2x farther has mu0 larger by 5 log10 2 = 1.505 mag (common practice)
    kw = dict(bands=("U", "B", "V"), magnitude_limit=40, error_at_limit=0.0, rng=12)
    near = simulate_members(80, 0.4, 9.0, **kw)
    far = simulate_members(80, 0.4, 9.0 + 5 * math.log10(2), **kw)
    a, b = fit_cluster(near, evolved_cut=None), fit_cluster(far, evolved_cut=None)
    assert b.distance_modulus - a.distance_modulus == pytest.approx(1.505, abs=0.01)
    assert (b.distance / a.distance).to_value(u.one) == pytest.approx(2.0, rel=0.005)


def test_evolved_stars_are_cut_automatically_and_by_the_user():
    members = simulate_members(120, 0.5, 10.0, bands=("U", "B", "V"), n_evolved=6, field_fraction=0.1, rng=13)
    fit = fit_cluster(members)
    assert "evolved_cut" in fit.flags
    assert np.count_nonzero(fit.evolved & members["true_evolved"]) >= 4
    assert abs(fit.ebv - 0.5) < 0.02 and abs(fit.distance_modulus - 10.0) < 0.1
    keep_all = fit_cluster(members, evolved_cut=None)
    assert not keep_all.evolved.any()
    cut = fit_cluster(members, evolved_cut=13.0)
    assert np.array_equal(cut.evolved, np.asarray(members["V"]) < 13.0)


def test_membership_probabilities_are_priors():
    members = simulate_members(60, 0.5, 10.0, bands=("U", "B", "V"), field_fraction=0.5, rng=14)
    members["pmem"] = np.where(members["true_member"], 0.9, 0.1)
    fit = fit_cluster(members, evolved_cut=None)
    assert any("pmem" in n for n in fit.notes)
    blind = fit_cluster(members, evolved_cut=None, probability=False)
    field = ~members["true_member"]
    assert np.mean(fit.weights[field]) < 0.25 and np.mean(fit.weights[field]) < np.mean(blind.weights[field])
    assert abs(fit.ebv - 0.5) < 0.02


def test_intervals_cover_the_truth_about_68_percent_of_the_time():
    # many random synthetic clusters; the 1-sigma intervals should hold 60-76% of the true
    # values (68.3% for a Gaussian: common practice)
    rng = np.random.default_rng(2024)
    hits = []
    systems = [("U", "B", "V"), ("B", "V", "J", "Ks"), ("G", "BP", "RP", "J", "Ks")]
    for i in range(24):
        ebv, mu0 = rng.uniform(0.1, 1.2), rng.uniform(8.0, 12.0)
        members = simulate_members(40, ebv, mu0, bands=systems[i % 3], rng=rng)
        fit = fit_cluster(members, evolved_cut=None)
        hits.append((abs(fit.ebv - ebv) < fit.ebv_err, abs(fit.distance_modulus - mu0) < fit.distance_modulus_err))
    cover = np.mean(hits, axis=0)
    print(f"1-sigma coverage: E(B-V) {cover[0]:.2f}, mu0 {cover[1]:.2f}")
    assert 0.60 <= np.mean(hits) <= 0.76
    assert np.all(cover >= 0.5) and np.all(cover <= 0.87)


# ----------------------------------------------------------------------------- many clusters -> tracers
@pytest.fixture(scope="module")
def two_clusters():
    a = simulate_members(60, 0.3, 9.5, bands=("U", "B", "V"), rng=31, l=30.0, b=1.0)
    a["cluster"] = "Alpha"
    b = simulate_members(60, 0.8, 11.0, bands=("G", "BP", "RP", "J", "Ks"), rng=32, l=359.9, b=-2.0)
    b["cluster"] = "Beta"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # metadata merge notes of vstack
        return vstack([a, b])


def test_fit_clusters_table_is_read_by_read_tracers(two_clusters, tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegeneracyWarning)
        table = fit_clusters(two_clusters, cluster_column="cluster")
    assert list(table["name"]) == ["Alpha", "Beta"]
    for col in ("l", "b", "ebv", "ebv_err", "mu0", "mu0_err", "distance_pc", "distance_pc_err", "ebv_mu0_corr"):
        assert col in table.colnames
    assert table["l"][0] == pytest.approx(30.0, abs=0.05) and table["b"][0] == pytest.approx(1.0, abs=0.05)
    # a mean on the sphere: l near 360/0 stays there
    assert min(table["l"][1], 360 - table["l"][1]) < 0.2
    assert abs(table["ebv"][0] - 0.3) < 0.03 and abs(table["mu0"][1] - 11.0) < 0.1
    assert np.all(np.abs(table["ebv_mu0_corr"]) <= 1)
    path = tmp_path / "tracers.ecsv"
    table.write(path)
    # read as it is (read_tracers notes that both a distance and a modulus are there)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tracers = read_tracers(path)
    assert len(tracers.rejected) == 0 and len(tracers.l) == 2
    np.testing.assert_allclose(np.asarray(tracers.distance), np.asarray(table["distance_pc"]), rtol=1e-6)
    np.testing.assert_allclose(np.asarray(tracers.av), 3.1 * np.asarray(table["ebv"]), rtol=1e-3)
    # or from the true modulus, on request
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        by_mu = read_tracers(path, columns={"distance_modulus": "mu0"})
    np.testing.assert_allclose(np.asarray(by_mu.distance), np.asarray(table["distance_pc"]), rtol=1e-6)


def test_a_fit_table_read_under_another_rv_says_so(two_clusters, tmp_path):
    # A_V = R_V E(B-V) is the definition of R_V (common practice): a table fitted under
    # R_V = 5 and read under the default 3.1 gives other A_V than the fit found, which the
    # reader must say; read under the fit's own law and R_V it says nothing of the kind
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegeneracyWarning)
        table = fit_clusters(two_clusters, cluster_column="cluster", rv=5.0, quiet=True)
    path = tmp_path / "fitted.ecsv"
    table.write(path)
    for source in (table, path):
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            other = read_tracers(source)
        said = [str(w.message) for w in seen if issubclass(w.category, AssumptionWarning) and "R_V = 5" in str(w.message)]
        assert len(said) == 1 and "rv=" in said[0]
        assert any("R_V = 5" in a for a in other.meta["assumptions"])
        np.testing.assert_allclose(np.asarray(other.av), 3.1 * np.asarray(table["ebv"]), rtol=1e-3)
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            same = read_tracers(source, law=table.meta["law"], rv=5.0)
        assert not [w for w in seen if "fitted under" in str(w.message)]
        np.testing.assert_allclose(np.asarray(same.av), 5.0 * np.asarray(table["ebv"]), rtol=1e-3)


def test_stand_in_errors_and_memberships_are_counted_not_silent():
    # a star whose magnitude error cell is empty (or 0) gets the stand-in error, and one without a
    # membership probability even odds: both are assumptions the user must be told of, with how
    # many stars they touch (dropped or filled rows are counted, common practice)
    m = simulate_members(60, 0.4, 10.0, bands=("B", "V"), rng=5)
    m["e_V"][[3, 7, 11]] = np.nan
    m["e_V"][20] = 0.0
    m["pmem"] = np.where(np.arange(len(m)) % 10 == 0, np.nan, 0.9)
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        fit = fit_cluster(m)
    said = [str(w.message) for w in seen if issubclass(w.category, AssumptionWarning)]
    assert any(f"4 of {len(m)} in 'e_V' (first at row 3)" in s and "0.03 mag assumed" in s for s in said), said
    n_unknown = int(np.sum(np.arange(len(m)) % 10 == 0))
    assert any(f"{n_unknown} of {len(m)} stars have no membership probability in 'pmem'" in n for n in fit.notes), fit.notes


def test_cli_fit_clusters_json(two_clusters, tmp_path, capsys):
    from dustkit.cli import main

    one = two_clusters[two_clusters["cluster"] == "Alpha"]
    src = tmp_path / "alpha.csv"
    one.write(src)
    rc = main(["fit-clusters", str(src), "-o", str(tmp_path / "alpha.ecsv"), "--json"])
    assert rc == 0
    out = json.loads(capsys.readouterr().out)
    assert set(out) == {"ebv", "ebv_err", "distance_modulus", "distance_modulus_err", "distance_pc", "n_members_used"}
    assert abs(out["ebv"] - 0.3) < 0.03 and out["distance_pc"] == pytest.approx(10 ** (out["distance_modulus"] / 5 + 1))
    assert Table.read(tmp_path / "alpha.ecsv")["name"][0] == "Alpha"
    # several clusters: --json refuses, the table is written otherwise
    both = tmp_path / "both.ecsv"
    two_clusters.write(tmp_path / "both_members.ecsv")
    assert main(["fit-clusters", str(tmp_path / "both_members.ecsv"), "-o", str(both), "--json"]) == 2
    assert main(["fit-clusters", str(tmp_path / "both_members.ecsv"), "-o", str(both), "--law", "odonnell94"]) == 0
    assert len(Table.read(both)) == 2


def test_bad_input_is_named():
    from dustkit import CatalogError

    with pytest.raises(CatalogError, match="No photometry"):
        fit_cluster(Table({"x": [1.0, 2.0]}))
    with pytest.raises(CatalogError, match="at least two bands"):
        fit_cluster(Table({"V": np.arange(10.0), "e_V": np.full(10, 0.01)}))
    with pytest.raises(CatalogError, match="at least 5"), pytest.warns(AssumptionWarning, match="assuming 0.03 mag"):
        fit_cluster(Table({"V": [10.0, 11.0, np.nan], "B-V": [0.5, 0.6, 0.7]}))


def test_clusters_package_is_computation_only():
    # layering rule (DESIGN.md): computation never imports matplotlib, ipywidgets or IPython, and no
    # module imports a _private name from another module
    import ast
    import subprocess
    import sys
    from pathlib import Path

    import dustkit.clusters as pkg

    for path in Path(pkg.__file__).parent.glob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                assert not {a.name.split(".")[0] for a in node.names} & {"matplotlib", "ipywidgets", "IPython"}, path
            elif isinstance(node, ast.ImportFrom):
                assert (node.module or "").split(".")[0] not in ("matplotlib", "ipywidgets", "IPython"), path
                if node.level >= 1:
                    assert not any(a.name.startswith("_") for a in node.names), (path, [a.name for a in node.names])
    code = ("import sys; import dustkit.clusters as c; t = c.simulate_members(20, 0.3, 9.0, rng=1);"
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('matplotlib', 'ipywidgets', 'IPython')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         cwd=str(Path(pkg.__file__).parents[2]))
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_a_clean_fit_announces_no_assumption_the_user_did_not_make():
    # a members table with every error column given: nothing was assumed by the user, so no
    # AssumptionWarning (an R_V no other test uses, so the reddening line is computed afresh)
    members = simulate_members(40, 0.4, 9.5, bands=("U", "B", "V"), rng=41)
    with warnings.catch_warnings():
        warnings.simplefilter("error", AssumptionWarning)
        fit = fit_cluster(members, rv=3.17, evolved_cut=None)
    assert np.isfinite(fit.ebv)


@pytest.mark.parametrize("law, rv", [("ccm89", 3.1), ("odonnell94", 3.1), ("ccm89", 5.0)])
def test_fitted_ebv_is_the_nominal_one_read_tracers_turns_back_into_av(law, rv):
    # R_V = A_V / E(B-V) by definition (Savage & Mathis 1979; CCM89), and read_tracers takes
    # A_V = R_V E(B-V) from a fit's table: the E(B-V) of the reddening line must be A_V / R_V.
    # The Johnson V passband extinction of a 10 000 K star is within 1.5% of A_V under
    # CCM89 / O94 (V = 1.000 by definition; the passband widens it by < 1%, from the bands
    # module's tests against the Johnson V curve), so A_V(V) / E(B-V) = R_V to 1.5%.
    ebv, a = reddening_curve(("V",), law, rv)
    for e in (0.3, 1.0, 2.0):
        assert np.interp(e, ebv, a[:, 0]) / e == pytest.approx(rv, rel=0.015)
    # and a whole fit, read back: the cluster's A_V is R_V times its E(B-V), reddened by
    # A_V = 2.0 (invented cluster, U, B, V)
    members = simulate_members(80, 2.0 / rv, 10.0, bands=("U", "B", "V"), law=law, rv=rv,
                               magnitude_limit=30, rng=43)
    fit = _quiet_fit(members, law=law, rv=rv, evolved_cut=None)
    a_v = np.interp(fit.ebv, ebv, a[:, 0])
    assert a_v == pytest.approx(2.0, abs=0.08)
    assert rv * fit.ebv == pytest.approx(a_v, rel=0.015)


def test_a_proper_motion_column_is_not_read_as_membership():
    # Gaia DR3's gaia_source calls the total proper motion 'pm' (mas/yr; Gaia archive
    # documentation, from memory): values of a few mas/yr are not membership per cent
    from dustkit.clusters import read_photometry

    members = simulate_members(40, 0.4, 9.5, bands=("U", "B", "V"), rng=44)
    members["pm"] = np.random.default_rng(1).uniform(0.5, 12.0, len(members))
    phot, notes = read_photometry(members)
    assert phot.probability is None and not any("pm" in n for n in notes)
    # a real membership column is still found
    members["PMemb"] = np.full(len(members), 0.8)
    phot, _ = read_photometry(members)
    assert phot.probability is not None and phot.columns["probability"] == "PMemb"


def test_empty_position_cells_do_not_move_the_cluster(tmp_path):
    # an invented cluster at l = 30, b = 1 whose CSV has three empty l cells: the mean position
    # is that of the stars with positions, not pulled toward l = 0 by the empty ones
    members = simulate_members(60, 0.3, 9.5, bands=("U", "B", "V"), rng=31, l=30.0, b=1.0)
    members["l"] = members["l"].astype(str)
    members["l"][:3] = ""
    path = tmp_path / "members.csv"
    members.write(path, format="ascii.csv")
    read = Table.read(path, format="ascii.csv")
    assert np.ma.is_masked(read["l"][0])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegeneracyWarning)
        table = fit_clusters(read, quiet=True)
    assert table["l"][0] == pytest.approx(30.0, abs=0.05) and table["b"][0] == pytest.approx(1.0, abs=0.05)


def test_a_column_of_star_names_is_not_taken_for_the_cluster(two_clusters):
    # member lists commonly carry each star's own designation in a 'name' column (common
    # practice): one value per row names stars, and fitting each star as a cluster of one is wrong
    alpha = two_clusters[two_clusters["cluster"] == "Alpha"]
    alpha.remove_column("cluster")
    alpha["name"] = [f"Invented-{i}" for i in range(len(alpha))]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        table = fit_clusters(alpha, quiet=True)
    assert len(table) == 1 and not str(table["flags"][0]).startswith("failed")
    assert abs(table["ebv"][0] - 0.3) < 0.03
    assert any(issubclass(w.category, AssumptionWarning) and "'name'" in str(w.message) for w in caught)


def test_rows_without_a_cluster_name_are_counted_not_fitted_as_a_cluster(two_clusters, tmp_path):
    from dustkit.exceptions import RowsRejectedWarning

    # an invented two-cluster list whose CSV has four empty cluster cells
    members = two_clusters.copy()
    members["cluster"] = members["cluster"].astype("U8")
    members["cluster"][[0, 1, 70, 71]] = ""
    path = tmp_path / "members.csv"
    members.write(path, format="ascii.csv")
    read = Table.read(path, format="ascii.csv")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        table = fit_clusters(read, cluster_column="cluster", quiet=True)
    assert list(table["name"]) == ["Alpha", "Beta"]
    assert table.meta["rows_without_cluster"] == 4
    assert any(issubclass(w.category, RowsRejectedWarning) and "4 of" in str(w.message) and "'cluster'" in str(w.message)
               for w in caught)


def test_a_heavily_reddened_cluster_is_found_beyond_ebv_3():
    # invented cluster behind A_V = 3.1 * 3.5 = 10.9 mag (common practice: young clusters in the
    # disc are seen through that much dust, their members measured in V and 2MASS J, H, Ks)
    members = simulate_members(100, 3.5, 10.0, bands=("V", "J", "H", "Ks"), rng=5, magnitude_limit=26,
                               absolute_range=(-2.0, 6.0))
    fit = _quiet_fit(members, evolved_cut=None)
    assert abs(fit.ebv - 3.5) < 0.05 and abs(fit.distance_modulus - 10.0) < 0.1
    assert "at_bound" not in fit.flags
