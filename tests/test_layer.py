"""The smooth dust layer: closed form, published limits, and recovery of known parameters."""

import numpy as np
import pytest
from astropy import units as u
from scipy.integrate import quad

from dustkit.layer import DustLayer, fit_layer, layer_av
from dustkit.simulate import DustField, simulate_tracers
from dustkit.tracers import TracerSet


def _av(b, d_kpc, z_sun_kpc, a0=1.0, h_kpc=0.1):
    return layer_av(b * u.deg, d_kpc * u.kpc, a0 * u.mag / u.kpc, h_kpc * u.kpc, z_sun_kpc * u.kpc).to_value(u.mag)


@pytest.mark.parametrize(
    "b, d, z_sun, expected",
    [
        # computed from the published formula (exponential layer with the Sun above the
        # mid-plane, a0 = 1 mag/kpc, h = 0.1 kpc); check values listed with their inputs
        (30.0, 0.5, 0.02, 0.150305),
        (-30.0, 0.5, 0.02, 0.216202),
        (-5.0, 3.0, 0.02, 1.252783),
        (30.0, 0.5, 0.0, 0.183583),
    ],
)
def test_layer_check_values(b, d, z_sun, expected):
    assert _av(b, d, z_sun) == pytest.approx(expected, abs=2e-6)


@pytest.mark.parametrize("b", [0.0, 1e-7, 0.3, -0.3, 5.0, -11.5, 45.0, -80.0, 90.0])
@pytest.mark.parametrize("d", [0.05, 0.5, 3.0])
def test_closed_form_matches_numerical_integration(b, d):
    z0, h = 0.02, 0.1
    mu = np.sin(np.deg2rad(b))
    cross = -z0 / mu if mu != 0 else -1.0
    pts = [cross] if 0 < cross < d else None
    num, _ = quad(lambda s: np.exp(-abs(z0 + s * mu) / h), 0.0, d, points=pts, limit=200, epsabs=1e-12)
    assert _av(b, d, z0) == pytest.approx(num, rel=1e-9)


def test_parenago_limits():
    # Sun in the mid-plane (Parenago form): b -> 0 gives a0 d; d -> infinity gives the
    # cosecant law a0 h / |sin b| (common practice; the classical limits of the formula)
    assert _av(0.0, 2.0, 0.0) == pytest.approx(2.0, rel=1e-12)
    assert _av(20.0, 1e4, 0.0) == pytest.approx(0.1 / np.sin(np.deg2rad(20.0)), rel=1e-9)
    # symmetric about the plane only when the Sun is in it
    assert _av(-20.0, 1.0, 0.0) == pytest.approx(_av(20.0, 1.0, 0.0), rel=1e-12)
    assert _av(-20.0, 1.0, 0.02) > _av(20.0, 1.0, 0.02)


def test_layer_units_round_trip():
    a = layer_av(10 * u.deg, 2000 * u.pc, 1.0 * u.mag / u.kpc, 120 * u.pc, 20 * u.pc)
    b = layer_av(10 * u.deg, 2 * u.kpc, 0.001 * u.mag / u.pc, 0.12 * u.kpc, 0.02 * u.kpc)
    assert a.unit == u.mag
    assert a.value == pytest.approx(b.value, rel=1e-12)


def _tracers(table, rv=3.1):
    return TracerSet.from_arrays(
        table["l"], table["b"], table["distance"], table["distance_err"],
        rv * table["ebv"], rv * table["ebv_err"], name=table["name"],
    )


def test_fit_recovers_known_layer():
    # invented layer; scale height and solar offset of the order found for open clusters
    # (Joshi 2005, MNRAS 362, 1259: h ~ 125 pc, z_sun ~ 23 pc)
    truth = DustField(a0=1.0, h=125.0, z_sun=20.0)
    t = simulate_tracers(truth, 3000, l_range=(0, 360), b_range=(-30, 30), distance_max=4000, rng=11)
    fit = fit_layer(_tracers(t))
    # tolerances: a few times the fitted errors, and 10% for the poorly constrained height
    assert fit.a0 == pytest.approx(1.0, rel=0.05)
    assert fit.h == pytest.approx(125.0, rel=0.10)
    assert fit.z_sun == pytest.approx(20.0, abs=6.0)
    assert 0 < fit.a0_err < 0.05 and 0 < fit.h_err < 15 and 0 < fit.z_sun_err < 6
    assert "mag/kpc" in str(fit)


def test_fit_is_robust_to_a_cloud():
    from dustkit.simulate import Cloud

    clean = DustField(a0=1.0, h=125.0, z_sun=20.0)
    cloudy = DustField(a0=1.0, h=125.0, z_sun=20.0, clouds=(Cloud(40, 0, 500, 6.0, 30, 3.0),))
    kw = dict(l_range=(0, 360), b_range=(-30, 30), distance_max=4000, rng=12)
    a = fit_layer(_tracers(simulate_tracers(clean, 3000, **kw)))
    b = fit_layer(_tracers(simulate_tracers(cloudy, 3000, **kw)))
    # a 3 mag cloud over ~100 deg^2 must not drag the mid-plane density by more than 10%
    assert b.a0 == pytest.approx(a.a0, rel=0.10)


def test_layer_dataclass_answers_in_mag():
    lay = DustLayer(a0=1.0, h=100.0, z_sun=20.0)
    assert lay.av(30 * u.deg, 0.5 * u.kpc).to_value(u.mag) == pytest.approx(0.150305, abs=2e-6)


@pytest.mark.parametrize("errors", [{"block_errors": True}, {"n_boot": 30}], ids=["block-sandwich", "bootstrap"])
def test_block_errors_of_small_catalogues_are_honest(errors):
    # 24 invented 40-tracer catalogues of one known layer (20 x 16 deg, the size of a small
    # survey field): the errors a user is given must match the actual errors. For honest
    # Gaussian errors the median |error / sigma| is 0.674 and 68% lie within 1 sigma (common
    # practice for checking error bars by Monte Carlo); too small errors would show up as a
    # median well above 1
    truth = DustField(a0=1.0, h=120.0, z_sun=20.0)
    rng = np.random.default_rng(5)
    b_q, d_q = rng.uniform(-8, 8, 400), rng.uniform(200, 3000, 400)  # answers inside the field
    z, z_av = [], []
    for seed in range(24):
        t = simulate_tracers(truth, 40, l_range=(100, 120), b_range=(-8, 8), distance_max=3000,
                             distance_frac_err=(0.06, 0.10), rng=200 + seed)
        fit = fit_layer(_tracers(t), random_state=0, **errors)
        z.append([(fit.a0 - 1.0) / fit.a0_err, (fit.h - 120.0) / fit.h_err, (fit.z_sun - 20.0) / fit.z_sun_err])
        jac = fit.gradient_pc(b_q, d_q)
        sigma = np.sqrt(np.einsum("in,ij,jn->n", jac, fit.covariance, jac))
        z_av.append(np.abs(fit.av_pc(b_q, d_q) - DustLayer(a0=1.0, h=120.0, z_sun=20.0).av_pc(b_q, d_q)) / sigma)
    med = np.median(np.abs(np.asarray(z)), axis=0)
    # measured 0.50, 1.01, 0.83 (block sandwich), 0.47, 0.93, 0.83 (bootstrap): the scale
    # height's error (a skewed, poorly constrained parameter with 40 tracers) is the least
    # sure; the bound catches anything much worse
    assert np.all(med > 0.35) and np.all(med < 1.2), med
    # the layer's A_V at the answers, from the statistical covariance: measured 0.70 (block
    # sandwich) and 0.71 (bootstrap) inside 1 sigma
    assert 0.55 <= np.mean(np.concatenate(z_av) <= 1.0) <= 0.80


@pytest.mark.parametrize("errors", [{"block_errors": True}, {"n_boot": 30}], ids=["block-sandwich", "bootstrap"])
def test_layer_errors_through_clouds_cover_the_clouds_pull(errors):
    # Eight invented disc catalogues (2 000 clusters to 4 kpc, |b| < 15 deg) of one known
    # layer with ten compact clouds of 0.5-2 mag each: clouds only add extinction, so the
    # tracers behind them pull a fitted layer up. The errors a user is given must cover the
    # actual error (common practice for checking error bars by Monte Carlo: for honest
    # Gaussian errors the median |error / sigma| is 0.674). Measured median |z| of a0: the
    # Jacobian's errors alone 2.96 (neighbours' residuals counted as independent), the block
    # sandwich alone 1.78 and the bootstrap alone 1.83 (every draw's fit is pulled the same
    # way), either with the pull 0.79
    from dustkit.simulate import random_clouds

    z, z_stat, z_jac, pulls = [], [], [], []
    for seed in range(8):
        clouds = random_clouds(10, (0, 360), (-6, 6), (300, 3000), 300 + seed, av_range=(0.5, 2.0),
                               radius_range=(1.0, 3.0))
        truth = DustField(a0=1.0, h=120.0, z_sun=20.0, clouds=clouds)
        t = simulate_tracers(truth, 2000, l_range=(0, 360), b_range=(-15, 15), distance_max=4000, rng=400 + seed)
        fit = fit_layer(_tracers(t), random_state=0, **errors)
        z.append((fit.a0 - 1.0) / fit.a0_err)
        z_stat.append((fit.a0 - 1.0) / np.sqrt(fit.covariance[0, 0]))
        z_jac.append((fit.a0 - 1.0) / np.sqrt(fit_layer(_tracers(t), random_state=0).covariance[0, 0]))
        pulls.append(fit.pull[0])
        assert fit.a0_err == pytest.approx(np.sqrt(fit.covariance[0, 0] + fit.pull[0] ** 2))
    assert np.all(np.asarray(pulls) > 0)  # the clouds pull up, never down
    assert np.median(np.abs(z)) < 1.3, z
    assert np.median(np.abs(z)) < 0.6 * np.median(np.abs(z_stat))
    # the blocks see what the Jacobian cannot: neighbours behind one cloud err together
    assert np.median(np.abs(z_stat)) < 0.8 * np.median(np.abs(z_jac))


def test_block_errors_in_a_cloudless_region_are_not_too_small():
    from dustkit.density import fit_catalogue_layer

    # six invented cloudless regions of 1 200 tracers (24 x 12 deg), the layer fitted as the
    # density model fits it: some twenty sky blocks in a few rows of latitude, and the block
    # sums alone under-estimate what the latitude contrast fixes, as a cluster-robust variance
    # does with few clusters carrying a parameter (Liang & Zeger 1986). The layer's A_V errors
    # a user is given (statistical + pull): RMS of error / sigma measured 1.26 from the block
    # sums alone, 1.13 kept no smaller than the Jacobian's; honest errors give 1 (common
    # practice for checking error bars by Monte Carlo)
    field = DustField(a0=1.0, h=120.0, z_sun=20.0)
    truth = DustLayer(a0=1.0, h=120.0, z_sun=20.0)
    z = []
    for seed in range(6):
        t = simulate_tracers(field, 1200, l_range=(28, 52), b_range=(-6, 6), distance_max=3000, rng=500 + seed)
        fit = fit_catalogue_layer(_tracers(t))  # block errors, the catalogue's distance shift
        rng = np.random.default_rng(seed)
        b_q, d_q = rng.uniform(-6, 6, 500), rng.uniform(200, 2800, 500)
        jac = fit.gradient_pc(b_q, d_q)
        sigma = np.sqrt(np.einsum("in,ij,jn->n", jac, fit.error_covariance(), jac))
        z.append((fit.av_pc(b_q, d_q) - truth.av_pc(b_q, d_q)) / sigma)
    assert np.sqrt(np.mean(np.square(z))) < 1.2


def test_block_errors_with_few_blocks_are_not_smaller_than_the_jacobians():
    # with one block the block sums are the fit's own estimating equations, zero at the
    # solution (a cluster-robust variance needs many clusters: Liang & Zeger 1986); the
    # errors must not vanish there
    t = _tracers(simulate_tracers(DustField(a0=1.0, h=120.0, z_sun=20.0), 200, l_range=(100, 120),
                                  b_range=(-8, 8), distance_max=3000, rng=3))
    plain = fit_layer(t, random_state=0)
    for labels in (np.zeros(200, int), np.arange(200) % 3):
        few = fit_layer(t, random_state=0, block_errors=True, blocks=labels)
        assert np.all(np.diag(few.covariance) >= np.diag(plain.covariance) * (1 - 1e-12))


def test_block_errors_and_a_bootstrap_are_not_asked_for_together():
    t = simulate_tracers(DustField(a0=1.0, h=120.0, z_sun=20.0), 40, l_range=(100, 120), b_range=(-8, 8),
                         distance_max=3000, rng=1)
    with pytest.raises(ValueError, match="block_errors"):
        fit_layer(_tracers(t), block_errors=True, n_boot=30)


def test_layer_state_round_trips_with_its_pull():
    lay = DustLayer(a0=1.1, h=130.0, z_sun=18.0, a0_err=0.02, h_err=3.0, z_sun_err=1.0, scatter=0.05,
                    n_used=10, covariance=np.eye(3) * 1e-4, pull=np.array([0.015, -1.0, 0.2]))
    back = DustLayer.from_state(lay.state())
    assert back == lay and np.array_equal(back.pull, lay.pull) and np.array_equal(back.covariance, lay.covariance)
    old = {k: v for k, v in lay.state().items() if k != "pull"}  # a file written before the pull existed
    assert np.array_equal(DustLayer.from_state(old).pull, np.zeros(3))


def test_a_layer_given_by_hand_reads_what_the_layer_command_writes_and_its_errors_are_its_covariance():
    from dustkit.exceptions import ParameterError
    from dustkit.layer import given_layer

    fitted = DustLayer(a0=1.1, h=125.0, z_sun=18.0, a0_err=0.05, h_err=9.0, z_sun_err=3.0,
                       covariance=np.diag([0.04, 60.0, 5.0]) ** 1, pull=np.array([0.03, 4.0, 1.0]))
    given = DustLayer.from_dict(fitted.as_dict())      # the keys of 'dustkit layer --json'
    assert (given.a0, given.h, given.z_sun) == (1.1, 125.0, 18.0)
    # a layer from elsewhere: its quoted (total) errors are its statistical errors, independent
    np.testing.assert_allclose(given.error_covariance(), np.diag([0.05**2, 9.0**2, 3.0**2]))
    assert given_layer(None) is None and given_layer(given) is given
    assert given_layer({"a0": 1.0, "h": 100.0, "z_sun": 0.0}).error_covariance().sum() == 0.0
    with pytest.raises(ParameterError, match="layer.z_sun"):
        DustLayer.from_dict({"a0": 1.0, "h": 100.0})
    with pytest.raises(ParameterError, match="layer.h"):
        DustLayer.from_dict({"a0": 1.0, "h": 0.0, "z_sun": 10.0})
    with pytest.raises(ParameterError, match="'layer'"):
        given_layer("1.0,100,20")
    # scaling its A_V (another R_V) scales a0, its error and covariance row, and nothing else
    s = given.with_scaled_a0(2.0)
    assert (s.a0, s.a0_err, s.h, s.z_sun) == (2.2, 0.1, 125.0, 18.0)
    np.testing.assert_allclose(s.error_covariance(), np.diag([0.1**2, 9.0**2, 3.0**2]))


def test_clouds_that_lift_a_layer_are_told_and_noise_alone_is_not():
    # noise alone puts as many tracers more than 2 sigma above a fitted layer as below it (a
    # symmetric error distribution; common practice); clouds only add extinction, so where a
    # large one covers much of a small region the tracers behind it outnumber the rest above
    import dustkit
    from dustkit.layer import cloud_lift, lift_caution
    from dustkit.simulate import Cloud

    def lift(field, seed, n=600):
        t = simulate_tracers(field, n, rng=np.random.default_rng(seed), l_range=(25, 55), b_range=(-8, 8),
                             distance_max=3000)
        tr = dustkit.read_tracers(t)
        layer = fit_layer(tr)
        return cloud_lift(layer, tr.b, tr.distance, tr.distance_err, tr.av, np.maximum(tr.av_err, 0.02))

    for seed in (1, 2, 3):
        plain = lift(DustField(a0=1.0, h=120.0, z_sun=20.0), seed)
        assert not plain["lifted"] and abs(plain["above"] - plain["below"]) < 0.03
    # a few tracers on one side of a small catalogue are chance (three of forty, none below: a
    # fair coin does that one time in eight)
    assert not any(lift(DustField(a0=1.0, h=120.0, z_sun=20.0), seed, n=40)["lifted"] for seed in range(300, 308))
    cloudy = lift(DustField(a0=1.0, h=120.0, z_sun=20.0, clouds=(Cloud(40, 0, 800, 7.0, 30, 1.5),)), 1)
    assert cloudy["lifted"] and cloudy["above"] > cloudy["below"] + 0.05
    assert "--layer-from" in lift_caution(cloudy)


@pytest.mark.parametrize("model", ["density", "binned"])
@pytest.mark.parametrize("bad, says", [({"a0": -1.0}, "layer.a0"), ({"h": 0.0}, "layer.h"),
                                       ({"z_sun": float("nan")}, "layer.z_sun"), ({"a0_err": -0.1}, "layer.a0_err")])
def test_a_dust_layer_given_to_a_model_is_checked_like_a_dict(model, bad, says):
    # a DustLayer made by hand is not checked when made, and went into the fit unchecked: a
    # negative a0 gave negative A_V, h = 0 a ZeroDivisionError from inside the layer formula
    import dustkit
    from dustkit.exceptions import ParameterError

    t = simulate_tracers(DustField(a0=1.0, h=120.0, z_sun=20.0), 60, l_range=(20, 60), b_range=(-8, 8), rng=4)
    layer = DustLayer(**{"a0": 1.0, "h": 120.0, "z_sun": 20.0, **bad})
    with pytest.raises(ParameterError, match=rf"The '{says}' parameter must be"):
        dustkit.build_model(dustkit.read_tracers(t), model=model, layer=layer, quiet=True)


@pytest.mark.parametrize("option, value", [
    ("max_tracers", 0),            # fitted no tracer and returned the starting values as a layer
    ("max_tracers", 2.5), ("n_boot", -3), ("n_boot", "10"),
    ("initial", (1.0, 100.0)), ("initial", (float("nan"), 100.0, 15.0)),
    ("distance_shift", np.zeros(3)), ("blocks", np.arange(3)),
])
def test_fit_layer_options_are_checked_naming_them(option, value):
    # numpy/scipy said "operands could not be broadcast", "negative dimensions", "Initial guess
    # is outside of provided bounds", or nothing at all (max_tracers=0, n_boot=-3)
    from dustkit.exceptions import ParameterError

    t = simulate_tracers(DustField(a0=1.0, h=120.0, z_sun=20.0), 60, l_range=(20, 60), b_range=(-8, 8), rng=4)
    tr = TracerSet.from_arrays(t["l"], t["b"], t["distance"], t["distance_err"], 3.1 * t["ebv"], 3.1 * t["ebv_err"])
    extra = {"n_boot": 3} if option == "blocks" else {}
    with pytest.raises(ParameterError, match=rf"The '{option}' parameter must be"):
        fit_layer(tr, **{option: value}, **extra)


def test_tracers_that_cannot_fix_the_layer_are_told_once_and_a_usual_catalogue_is_not(recwarn):
    # invented tracers all in the plane (b = 0), or all toward one position: a0, h and z_sun are
    # degenerate (|z| is nearly constant), the fit returned errors of 1e6-1e9 and a build then
    # answered from that layer (7 mag +- 21 000 mag) without a word
    import warnings

    import dustkit
    from dustkit.exceptions import DustkitWarning

    rng = np.random.default_rng(0)
    n = 30
    d, av = rng.uniform(200, 3000, n), rng.uniform(0.5, 2.0, n)
    plane = TracerSet.from_arrays(rng.uniform(20, 50, n), np.zeros(n), d, 0.1 * d, av, np.full(n, 0.05))
    one_spot = TracerSet.from_arrays(np.full(n, 30.0), np.full(n, 1.0), d, 0.1 * d, av, np.full(n, 0.05))
    for tr in (plane, one_spot):
        with pytest.warns(DustkitWarning, match=r"do not determine the smooth dust layer.*--layer-from"):
            fit_layer(tr)
    recwarn.clear()
    dustkit.build_model(plane, model="binned", nside=8, quiet=True)
    said = [w for w in recwarn if issubclass(w.category, DustkitWarning) and "do not determine" in str(w.message)]
    assert len(said) == 1 and "latitudes 0.00 to 0.00 deg" in str(said[0].message)
    # a usual small catalogue (40 invented clusters over 40 x 20 deg) fixes its layer: nothing to say
    t = simulate_tracers(DustField(a0=1.0, h=120.0, z_sun=20.0), 40, l_range=(20, 60), b_range=(-10, 10),
                         distance_max=3000, rng=5)
    with warnings.catch_warnings():
        warnings.simplefilter("error", DustkitWarning)
        fit_layer(TracerSet.from_arrays(t["l"], t["b"], t["distance"], t["distance_err"], 3.1 * t["ebv"],
                                        3.1 * t["ebv_err"]))


def _no_dust(n, av, b_range=(50, 70), seed=3):
    """Invented tracers of a dust-free high-latitude test region: A_V as given, errors 0.03 mag."""
    rng = np.random.default_rng(seed)
    d = rng.uniform(100, 1500, n)
    return TracerSet.from_arrays(rng.uniform(100, 140, n), rng.uniform(*b_range, n), d, 0.05 * d,
                                 np.broadcast_to(np.asarray(av, float), (n,)).copy(), np.full(n, 0.03))


@pytest.mark.parametrize("case", ["zeros", "five_tiny", "noise"])
def test_tracers_without_dust_give_a0_consistent_with_zero_and_h_z_sun_marked_not_fitted(case):
    # A catalogue with no dust (every A_V 0, or 0 +- noise, or a handful of 0.01 mag) said
    # "do not determine" and reported a0 = 0.167 +- nan mag/kpc, h = 20.6 +- nan pc, or errors of 1e4-1e8.
    # Now: a0 from the data with its error (an upper limit follows), h and z_sun held at the reference
    # values (open clusters: h about 125 pc, z_sun 15-25 pc; Joshi 2005, MNRAS 362, 1259) and marked.
    from dustkit.exceptions import DustkitWarning
    from dustkit.layer import REFERENCE_LAYER

    n = 200
    av = {"zeros": 0.0, "five_tiny": np.where(np.arange(n) < 5, 0.01, 0.0),
          "noise": np.random.default_rng(9).normal(0, 0.03, n)}[case]
    with pytest.warns(DustkitWarning, match=r"show no dust layer.*a0 = .* mag/kpc.*not fitted"):
        lay = fit_layer(_no_dust(n, av))
    assert lay.not_fitted == ("h", "z_sun")
    assert (lay.h, lay.h_err, lay.z_sun, lay.z_sun_err) == REFERENCE_LAYER
    assert np.all(np.isfinite([lay.a0, lay.a0_err])) and lay.a0 < 2 * lay.a0_err  # consistent with 0
    # the error from the data: 200 tracers of 0.03 mag fix the column above them (b = 60 deg: A_V to
    # infinity is a0 h / sin b) to about 0.03 / sqrt(200) = 0.002 mag, i.e. a0 to about 0.02 mag/kpc
    # for h near 125 pc (the error of a weighted mean: common practice)
    assert 0.005 < lay.a0_err < 0.1
    assert "not fitted" in str(lay) and "no dust detected" in str(lay)
    assert DustLayer.from_state(lay.state()).not_fitted == ("h", "z_sun")


def test_a_model_of_tracers_without_dust_answers_zero_with_honest_errors(tmp_path):
    # The density build on the dust-free catalogue answered 5e-8 +- 6e-8 mag at the tracers and
    # 7e-6 +- 1e-4 mag in the plane at 3 kpc: an error far below what 0.03-mag tracers can say.
    import warnings

    import dustkit

    n = 200
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = dustkit.build_model(_no_dust(n, 0.0), quiet=True)
    assert model.layer_.not_fitted == ("h", "z_sun")
    av, err = (x.to_value(u.mag) for x in model.av([120, 120, 120] * u.deg, [60, 60, 0] * u.deg,
                                                     [1000, 3000, 3000] * u.pc))
    assert np.all(np.abs(av) <= 2 * err)
    # no smaller than what the tracers can say: the error of a mean of 200 values of +- 0.03 mag
    # (common practice), even where they all sit
    assert np.all(err[:2] >= 0.03 / np.sqrt(n))
    # in the plane, out of reach of the data, the error follows a0's: 3 kpc x a0_err at least
    assert err[2] >= 0.5 * 3.0 * model.layer_.a0_err
    # the mark reaches what users read: the command's lines, the --json a later --layer-from takes, model files
    from dustkit.cli import _layer_lines

    lines = _layer_lines(model.layer_)
    assert "no dust detected" in lines[1] and "NOT FITTED" in lines[2] and "NOT FITTED" in lines[3]
    assert DustLayer.from_dict({**model.layer_.as_dict(), "not_fitted": ["h", "z_sun"]}).not_fitted == ("h", "z_sun")
    for kind in ("density", "binned"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            m = model if kind == "density" else dustkit.build_model(_no_dust(n, 0.0), model="binned", nside=8,
                                                                    quiet=True)
            path = tmp_path / f"{kind}.fits"
            dustkit.save_model(m, path)
            assert dustkit.load_model(path).layer_.not_fitted == ("h", "z_sun")


def test_tracers_without_dust_are_told_once_by_the_fit_and_by_a_build(recwarn):
    # invented tracers that show no dust (every A_V 0 +- 0.05): the fit runs to the edge of its
    # range (a0 and h at their lowest); the density build then answered ~0 mag +- 1e130 mag without
    # a word. Both the layer fit and a build now say once that there is no dust layer and what to do
    import dustkit
    from dustkit.exceptions import DustkitWarning

    rng = np.random.default_rng(1)
    n = 30
    d = rng.uniform(200, 2000, n)
    none = TracerSet.from_arrays(rng.uniform(100, 120, n), rng.uniform(-8, 8, n), d, 0.1 * d, np.zeros(n),
                                 np.full(n, 0.05))
    with pytest.warns(DustkitWarning, match=r"show no dust layer: a0 = .* consistent with 0"):
        fit_layer(none)
    recwarn.clear()
    dustkit.build_model(none, quiet=True)
    said = [w for w in recwarn if issubclass(w.category, DustkitWarning) and "show no dust" in str(w.message)]
    assert len(said) == 1 and "layer=..." in str(said[0].message) and "not fitted" in str(said[0].message)


def _one_small_field():
    """200 invented tracers of the smooth layer alone in one 3 x 3 deg field at b = 1 deg (dustkit.simulate).

    With this seed no sight line crosses the mid-plane at the fitted z_sun, so a0 and z_sun enter
    only as ``a0 exp(-z_sun / h)``: the fit's information is singular (about 1 such fit in 16).
    """
    import warnings

    import dustkit

    field = DustField(a0=1.0, h=120.0, z_sun=20.0)
    t = simulate_tracers(field, 200, rng=np.random.default_rng(13), l_range=(119.0, 122.0), b_range=(-0.5, 2.5),
                         distance_max=3000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return field, t, dustkit.read_tracers(t)


def test_a_singular_small_field_holds_z_sun_at_the_reference_and_never_gives_zero_error():
    # Before: the fit's covariance held entries of 1e15, was not symmetric and had a negative
    # eigenvalue (other draws: NaN or inf), read as 0 where NaN; the layer's A_V error came out NaN
    # or 0 along the direction the tracers do not fix, and 1e5 mag on the other side of the plane.
    from dustkit.density import fit_catalogue_layer
    from dustkit.exceptions import DustkitWarning
    from dustkit.layer import REFERENCE_LAYER

    field, _, tracers = _one_small_field()
    with pytest.warns(DustkitWarning, match=r"cannot tell z_sun apart.*held at the reference z_sun = 20 \+- 10 pc"):
        lay = fit_catalogue_layer(tracers)
    # the parameter the tracers cannot fix is said, and held at the reference value with the
    # reference spread as its error (common practice: z_sun about 20 +- 10 pc for open clusters)
    assert lay.not_fitted == ("z_sun",)
    assert (lay.z_sun, lay.z_sun_err) == REFERENCE_LAYER[2:]
    cov = lay.statistical_covariance()
    # a covariance users can propagate: finite, symmetric, positive definite
    assert np.all(np.isfinite(cov)) and np.allclose(cov, cov.T) and np.linalg.eigvalsh(cov)[0] > 0
    b, d = np.array([1.0, 1.0, -5.0, -30.0]), np.array([1000.0, 2500.0, 2000.0, 2000.0])
    g = lay.gradient_pc(b, d)
    sigma = np.sqrt(np.einsum("in,ij,jn->n", g, cov, g))
    # in the field and on the other side of the plane, the invented layer lies within 3 sigma
    # of the fitted one (a 3-sigma check: common practice), and no error is zero
    assert np.all(sigma > 0)
    assert np.all(np.abs(lay.av_pc(b, d) - field.layer_av(b, d)) <= 3 * sigma)
    # in the field the reference spread cancels along what the tracers fix (a0 follows z_sun as
    # exp(z_sun / h), the layer's closed form): far below the 10 pc spread's own share there
    share = np.abs(g[2, :2]) * REFERENCE_LAYER[3]
    assert np.all(sigma[:2] < 0.3 * share)
    # away from the field the spread reaches the answer: toward b = -5 deg at 2 kpc the error is
    # at least the part of the z_sun spread the tracers leave (an exponential layer's A_V at
    # 2 kpc moves by about A_V / h per pc of z_sun: several hundredths of a mag per 10 pc)
    assert sigma[2] > 0.05


def test_a_layer_read_with_a_non_finite_covariance_gets_the_reference_spread_not_zero():
    # files written before the singular fit was held could keep NaN or inf in the layer's
    # covariance; reading NaN as 0 gave the answers no layer error along that parameter
    from dustkit.layer import REFERENCE_LAYER

    cov = np.diag([0.01, 25.0, np.nan])
    cov[0, 2] = cov[2, 0] = np.inf
    lay = DustLayer(a0=1.0, h=110.0, z_sun=25.0, covariance=cov)
    out = lay.statistical_covariance()
    # z_sun gets its reference spread (common practice, 10 pc), uncorrelated; a0 and h keep their own
    assert out[2, 2] == REFERENCE_LAYER[3] ** 2 and out[0, 2] == out[2, 0] == 0.0
    assert out[0, 0] == 0.01 and out[1, 1] == 25.0
    g = lay.gradient_pc(np.array([-20.0]), np.array([2000.0]))
    assert float(g[:, 0] @ lay.error_covariance() @ g[:, 0]) > 0


def test_a_model_on_a_singular_small_field_carries_the_layer_error_and_keeps_the_mark(tmp_path, capsys):
    # The density model built on the singular small field answered on the other side of the
    # plane with errors of 2e5-9e5 mag (a layer error that means nothing) and gave no sign that
    # z_sun was not fixed; now its answers carry the reference spread there, and the mark reaches
    # what users read and survives files.
    import json
    import warnings

    import dustkit
    from dustkit.cli import _layer_lines, main
    from dustkit.density import DensityModel

    field, table, tracers = _one_small_field()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = DensityModel(quiet=True).fit(tracers)
    assert model.layer_.not_fitted == ("z_sun",)
    l, b, d = np.full(4, 120.5), np.array([1.0, 1.0, -5.0, -30.0]), np.array([1000.0, 2500.0, 2000.0, 2000.0])
    av, err = model.av_pc(l, b, d)
    layer_err = model.layer_err_pc(l, b, d)
    # every answer carries a layer error, finite and not zero, and no larger than the whole error
    assert np.all(np.isfinite(layer_err)) and np.all(layer_err > 0) and np.all(layer_err <= err)
    # the invented truth lies within 3 sigma (common practice), with errors that still mean
    # something (below 1 mag at 2 kpc where the truth is 0.3-1.2 mag)
    assert np.all(np.abs(av - field.av(l, b, d)) <= 3 * err) and np.all(err < 1.0)
    # the command's lines say which parameter is held and why, without claiming "no dust"
    lines = _layer_lines(model.layer_)
    assert "NOT FITTED" in lines[3] and "cannot fix" in lines[3] and "NOT FITTED" not in lines[2]
    assert "no dust" not in " ".join(lines)
    # --json keeps it, and a layer given back from it keeps it (dustkit build --layer-from)
    table.write(tmp_path / "field.ecsv")
    assert main(["layer", str(tmp_path / "field.ecsv"), "--json"]) == 0
    given = json.loads(capsys.readouterr().out)
    assert given["not_fitted"] == ["z_sun"] and DustLayer.from_dict(given).not_fitted == ("z_sun",)
    # model files keep the mark, the covariance and the answers, bit for bit
    dustkit.save_model(model, tmp_path / "m.fits")
    loaded = dustkit.load_model(tmp_path / "m.fits")
    assert loaded.layer_.not_fitted == ("z_sun",)
    assert np.array_equal(loaded.layer_.covariance, model.layer_.covariance)
    assert all(np.array_equal(x, y) for x, y in zip(loaded.av_pc(l, b, d), (av, err)))
