"""Tests of dustkit.features: steps (dust clouds) along sight lines and across the sky.

Every region and cloud here is invented and simulated with dustkit.simulate; the checks are
against the simulation's known truth (cloud distances and columns), which is the outside
reference for a detector.
"""

import warnings

import numpy as np
import pytest
from astropy import units as u

from dustkit._errors import AssumptionWarning, ModelNotFittedError, ParameterError, RowsRejectedWarning
from dustkit.features import detect_features, find_steps, sight_line_features
from dustkit.model import CAUTION, ExtinctionModel
from dustkit.simulate import Cloud, DustField, simulate_tracers
from dustkit.tracers import TracerSet

RV = 3.1  # common practice: A_V = 3.1 E(B-V) for the diffuse medium (Savage & Mathis 1979)


def _line(clouds, n, seed, b_range=(0.0, 1.5), distance_max=3000.0):
    """Tracers along one narrow invented sight line (l 30-31.5 deg); clouds cover it evenly."""
    t = simulate_tracers(DustField(clouds=tuple(clouds)), n, l_range=(30.0, 31.5), b_range=b_range,
                         distance_max=distance_max, rng=seed)
    return (t["distance"].quantity, t["distance_err"].quantity, RV * t["ebv"].quantity, RV * t["ebv_err"].quantity)


def _flat_cloud(distance, av):
    # invented cloud: 50 deg Gaussian radius, so its column is the same over the 1.5 deg cone
    return Cloud(l=30.75, b=0.75, distance=distance, radius=50.0, depth=30.0, av=av)


# ----------------------------------------------------------------------------- one sight line

def test_two_invented_clouds_are_found_at_their_distances():
    # invented clouds: 1.0 mag at 900 pc and 0.6 mag at 1800 pc
    d, de, av, ae = _line([_flat_cloud(900.0, 1.0), _flat_cloud(1800.0, 0.6)], 400, seed=11)
    steps = find_steps(d, de, av, ae, n_boot=40)
    assert len(steps) == 2
    for row, (true_d, true_av) in zip(steps, [(900.0, 1.0), (1800.0, 0.6)]):
        assert abs(row["distance"].to_value(u.pc) / true_d - 1) < 0.15  # the requirement
        # step sizes: measured bias on simulations is +0.05 to +0.15 mag (see the module notes)
        assert abs(row["delta_av"].to_value(u.mag) - true_av) < 0.3
        assert row["n_front"] >= 3 and row["n_behind"] >= 3
        assert row["significance"] >= 10 and row["boot_fraction"] >= 0.5
    assert steps["distance"].unit == u.pc and steps["delta_av"].unit == u.mag
    assert steps.meta["caution"] == CAUTION
    assert steps.meta["n_tracers"] == 400 and steps.meta["n_rejected"] == 0


def test_detection_rate_and_distance_accuracy_for_half_a_magnitude():
    # invented cloud of 0.5 mag at 1200 pc, 150 tracers per sight line, 10 independent lines;
    # the smooth layer is removed first (with its slope given), as detect_features does
    layer = DustField()
    found, rel = 0, []
    for seed in range(10):
        t = simulate_tracers(DustField(clouds=(_flat_cloud(1200.0, 0.5),)), 150, l_range=(30.0, 31.5),
                             b_range=(0.0, 1.5), distance_max=3000.0, rng=100 + seed)
        d, b = t["distance"].quantity.to_value(u.pc), np.asarray(t["b"])
        av = RV * t["ebv"].quantity - layer.layer_av(b, d) * u.mag
        slope = (layer.layer_av(b, 1.01 * d) - layer.layer_av(b, 0.99 * d)) / (0.02 * d) * u.mag / u.pc
        steps = find_steps(t["distance"].quantity, t["distance_err"].quantity, av, RV * t["ebv_err"].quantity,
                           av_slope=slope, n_boot=20, random_state=seed)
        near = np.abs(steps["distance"].to_value(u.pc) / 1200.0 - 1) < 0.15
        found += bool(near.any())
        rel.extend(steps["distance"].to_value(u.pc)[near] / 1200.0 - 1)
        assert near.sum() == len(steps)  # no step away from the cloud
    # measured on simulations: 31 of 40 lines at 100 tracers; here 10 of 10
    assert found >= 8
    assert np.sqrt(np.mean(np.square(rel))) < 0.10  # measured rms: 5-6%


def test_false_positive_rate_in_cloud_free_sight_lines_is_below_five_percent():
    # invented layer-only sky: any step found is a false positive
    n_lines, false = 40, 0
    for seed in range(n_lines):
        d, de, av, ae = _line([], 150, seed=500 + seed)
        false += len(find_steps(d, de, av, ae, n_boot=20, random_state=seed)) > 0
    assert false / n_lines < 0.05


def test_a_single_outlier_is_not_a_cloud():
    d, de, av, ae = _line([], 150, seed=7)
    assert len(find_steps(d, de, av, ae, n_boot=20)) == 0
    order = np.argsort(d.value)
    for where in (order[75], order[-2], order[-1]):  # middle, and among the farthest tracers
        bad = av.copy()
        bad[where] += 3.0 * u.mag
        assert len(find_steps(d, de, bad, ae, n_boot=20)) == 0


def test_a_step_needs_min_tracers_on_both_sides():
    d, de, av, ae = _line([], 150, seed=8)
    order = np.argsort(d.value)
    lifted = av.copy()
    lifted[order[-2:]] += 1.5 * u.mag  # only two tracers behind a "step"
    assert len(find_steps(d, de, lifted, ae, min_tracers=3, n_boot=20)) == 0
    lifted[order[-8:]] += 1.5 * u.mag  # eight tracers behind: a real (invented) step
    steps = find_steps(d, de, lifted, ae, min_tracers=3, n_boot=20)
    assert len(steps) == 1 and steps["n_behind"][0] >= 3
    # the same step is refused when ten tracers are required on each side
    assert len(find_steps(d, de, lifted, ae, min_tracers=10, n_boot=20)) == 0


def test_bootstrap_errors_are_positive_and_of_the_right_order():
    d, de, av, ae = _line([_flat_cloud(1200.0, 0.8)], 300, seed=21)
    steps = find_steps(d, de, av, ae, n_boot=60)
    assert len(steps) == 1
    err = steps["distance_err"][0].to_value(u.pc)
    dist = steps["distance"][0].to_value(u.pc)
    near = np.abs(np.log(d.to_value(u.pc) / dist)) < 0.2
    typical = np.median(de.to_value(u.pc)[near])
    # common practice: a location from n tracers cannot beat ~ their error / sqrt(n), and
    # with dozens of tracers near the step it should beat one tracer's error
    assert typical / np.sqrt(near.sum()) <= err <= typical
    derr = steps["delta_av_err"][0].to_value(u.mag)
    assert 0.0 < derr < 0.5 * steps["delta_av"][0].to_value(u.mag)


def test_same_seed_same_table():
    d, de, av, ae = _line([_flat_cloud(1000.0, 0.8)], 200, seed=3)
    a = find_steps(d, de, av, ae, n_boot=20, random_state=5)
    b = find_steps(d, de, av, ae, n_boot=20, random_state=5)
    assert np.array_equal(a["distance_err"].value, b["distance_err"].value)


# ----------------------------------------------------------------------------- bad input

def test_bad_input_is_reported():
    d, de, av, ae = _line([_flat_cloud(1000.0, 0.8)], 200, seed=4)
    with pytest.raises(ParameterError, match="same length"):
        find_steps(d, de[:-1], av, ae)
    with pytest.raises(ParameterError, match="The 'min_tracers' parameter must be an integer"):
        find_steps(d, de, av, ae, min_tracers=1)
    bad = d.copy()
    bad[[3, 9]] = np.nan * u.pc
    with pytest.warns(RowsRejectedWarning, match="2 of 200 tracers.*rows 3, 9"):
        t = find_steps(bad, de, av, ae, n_boot=20)
    assert t.meta["n_rejected"] == 2 and t.meta["n_tracers"] == 198
    with pytest.warns(AssumptionWarning, match="'distance' has no unit; assuming pc"):
        find_steps(d.value, de, av, ae, n_boot=20)
    with pytest.raises(ModelNotFittedError):
        detect_features(ExtinctionModel())
    tracers = TracerSet.from_arrays(np.full(200, 30.7), np.full(200, 0.7), d, de, av, ae)
    with pytest.raises(ParameterError, match="'radius'"):
        sight_line_features(tracers, 30.7 * u.deg, 0.7 * u.deg)


def test_sight_line_features_on_a_tracer_set():
    d, de, av, ae = _line([_flat_cloud(1000.0, 0.8)], 250, seed=12)
    rng = np.random.default_rng(0)
    l = 30.0 + 1.5 * rng.random(250)
    b = 1.5 * rng.random(250)
    tracers = TracerSet.from_arrays(l, b, d, de, av, ae)
    t = sight_line_features(tracers, 30.75 * u.deg, 0.75 * u.deg, radius=2 * u.deg, n_boot=20)
    assert len(t) == 1
    assert abs(t["distance"][0].to_value(u.pc) / 1000.0 - 1) < 0.15
    assert t["l"][0] == 30.75 * u.deg and t.meta["layer_subtracted"] is False


# ----------------------------------------------------------------------------- across the sky

# invented region: two clouds in a 24 x 12 deg field, 5000 simulated tracers out to 3 kpc
CLOUDS = (Cloud(l=25.0, b=0.0, distance=1000.0, radius=2.0, depth=30.0, av=1.0),
          Cloud(l=35.0, b=1.0, distance=1600.0, radius=2.0, depth=30.0, av=0.6))


@pytest.fixture(scope="module")
def sky():
    t = simulate_tracers(DustField(a0=1.0, h=120.0, z_sun=20.0, clouds=CLOUDS), 5000, l_range=(18.0, 42.0),
                         b_range=(-6.0, 6.0), distance_max=3000.0, rng=2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tracers = TracerSet.from_arrays(t["l"], t["b"], t["distance"], t["distance_err"], RV * t["ebv"],
                                        RV * t["ebv_err"])
    model = ExtinctionModel(nside=32, distance_max=4000 * u.pc, distance_step=200 * u.pc, n_folds=3,
                            sky_passes=(0, 1, 2), quiet=True).fit(tracers)
    feats, det = detect_features(model, n_boot=20, return_detections=True, quiet=True)
    return model, feats, det


def _sep(l1, b1, l2, b2):
    l1, b1, l2, b2 = (np.deg2rad(v) for v in (l1, b1, l2, b2))
    c = np.sin(b1) * np.sin(b2) + np.cos(b1) * np.cos(b2) * np.cos(l1 - l2)
    return np.rad2deg(np.arccos(np.clip(c, -1, 1)))


def test_each_invented_cloud_is_one_feature_at_the_right_distance(sky):
    _, feats, _ = sky
    assert feats.meta["caution"] == CAUTION
    assert feats["distance"].unit == u.pc and feats["extent"].unit == u.deg
    for c in CLOUDS:  # both clouds have delta A_V >= 0.5 mag and dozens of tracers per cone
        sep = _sep(feats["l"].to_value(u.deg), feats["b"].to_value(u.deg), c.l, c.b)
        close = sep < 2 * c.radius
        assert close.sum() == 1, f"cloud at {c.distance} pc gave {close.sum()} features"
        row = feats[np.nonzero(close)[0][0]]
        assert abs(row["distance"].to_value(u.pc) / c.distance - 1) < 0.15
        assert row["n_pixels"] >= 2
        assert 0.25 * c.radius < row["extent"].to_value(u.deg) < 2.0 * c.radius
        assert abs(row["delta_av"].to_value(u.mag) - c.av) < 0.4
        assert 0 < row["distance_err"].to_value(u.pc) < 0.1 * c.distance


def test_no_features_far_from_the_invented_clouds(sky):
    model, feats, det = sky
    far = np.ones(len(feats), bool)
    for c in CLOUDS:
        far &= _sep(feats["l"].to_value(u.deg), feats["b"].to_value(u.deg), c.l, c.b) > 3 * c.radius
    assert far.sum() == 0
    # per pixel: detections well away from any cloud, over the pixels searched there
    l, b = model.grid_.pixel_centres(model.informed_pixels())
    away = np.ones(l.size, bool)
    det_away = np.ones(len(det), bool)
    for c in CLOUDS:
        away &= _sep(l, b, c.l, c.b) > 3 * c.radius
        det_away &= _sep(det["l"].to_value(u.deg), det["b"].to_value(u.deg), c.l, c.b) > 3 * c.radius
    assert away.sum() >= 20
    assert det_away.sum() / away.sum() < 0.05


def test_detections_link_to_features(sky):
    _, feats, det = sky
    assert set(np.unique(det["feature"])) == set(feats["feature"])
    for row in feats:
        members = det[det["feature"] == row["feature"]]
        assert len(members) == row["n_pixels"]
        assert members["delta_av"].max() == row["delta_av_max"]


def test_features_module_stays_in_the_computation_layer():
    import subprocess
    import sys

    code = "import sys, dustkit.features; print('matplotlib' in sys.modules, 'ipywidgets' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.split() == ["False", "False"]  # DESIGN.md: computation modules never import them


def test_step_settings_that_make_no_sense_are_refused():
    # a BIC improvement below 0 would list steps the data favour less than no step; a seed is an integer >= 0
    d, de, av, ae = _line([_flat_cloud(1000.0, 1.0)], 60, 1)
    with pytest.raises(ParameterError, match="'min_significance' parameter must be a real number >= 0"):
        find_steps(d, de, av, ae, n_boot=20, min_significance=-5)
    with pytest.raises(ParameterError, match="'random_state' parameter must be an integer >= 0"):
        find_steps(d, de, av, ae, n_boot=20, random_state=-1)
