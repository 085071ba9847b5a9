"""Zone-axis survey: symmetry, meaning of the predicted precision, scaling."""

import json

import gemmi
import numpy as np
import pytest
from conftest import DETECTOR

from laueline import predict
from laueline.cli import main
from laueline.errors import InputError
from laueline.points import Points
from laueline.refine import refine
from laueline.survey import candidate_axes, strain_precision, survey, survey_axis


def test_equivalent_axes_permute_components(si):
    # [2 3 0] and [3 2 0] are related by the mirror x <-> y of m-3m, which swaps
    # exx <-> eyy and eyz <-> exz and keeps ezz, exy.
    a = survey_axis(si, (2, 3, 0)).sigma_strain
    b = survey_axis(si, (3, 2, 0)).sigma_strain
    np.testing.assert_allclose(b, a[[1, 0, 2, 4, 3, 5]], rtol=1e-6)


@pytest.mark.parametrize("max_index", [2, 3, 5])
def test_distinct_axis_count_against_gemmi_orbits(si, max_index):
    # Independent count: orbits of primitive [uvw] under gemmi's rotations of
    # F d -3 m (Laue class m-3m), found by flood-filling a set.
    ops = gemmi.SpaceGroup("F d -3 m:2").operations()
    rots = {tuple(map(tuple, (np.array(op.rot) // op.DEN).tolist())) for op in ops}
    rots = [np.array(r) for r in rots] + [-np.array(r) for r in rots]
    r = range(-max_index, max_index + 1)
    remaining = {(u, v, w) for u in r for v in r for w in r
                 if (u, v, w) != (0, 0, 0) and np.gcd.reduce([u, v, w]) == 1}
    orbits = 0
    while remaining:
        seed = np.array(remaining.pop())
        remaining -= {tuple(int(x) for x in R @ seed) for R in rots}
        orbits += 1
    zones, _ = candidate_axes(si, max_index)
    assert len(zones) == orbits


def _monte_carlo(si, zone, n_trials, rng, sigma_mrad=0.005):
    pattern = predict(si, zone, 200, 6.0, min_strength=0.05)
    ha, hb = pattern.crossing_hkl()
    clean = DETECTOR.to_pixels(pattern.crossing_mrad)
    noise_px = sigma_mrad * DETECTOR.scale_px_per_mrad
    values = []
    for _ in range(n_trials):
        pts = Points(clean + rng.normal(0, noise_px, clean.shape), ha, hb)
        fit = refine(si, zone, pts, x_axis=pattern.x_axis, calibration=(200.0, DETECTOR),
                     mirror=False)
        values.append(fit.values[:6])
    return np.std(values, axis=0, ddof=1)


def test_prediction_matches_monte_carlo_of_refine(si):
    # The same noise in a Monte Carlo of the fit: within 25 % (60 trials give a
    # standard deviation to about 9 %), and the ranking order holds.
    result = survey(si, max_index=3)
    finite = [a for a in result.axes if np.isfinite(a.score)]
    top, low = finite[0], finite[-1]
    assert top.score < low.score
    rng = np.random.default_rng(21)
    observed_top = _monte_carlo(si, top.zone, 60, rng)
    observed_low = _monte_carlo(si, low.zone, 60, rng)
    np.testing.assert_allclose(top.sigma_strain / observed_top, 1, atol=0.25)
    np.testing.assert_allclose(low.sigma_strain / observed_low, 1, atol=0.25)
    assert observed_top.max() < observed_low.max()


def test_scaling_with_noise_and_crossing_count(si):
    pattern = predict(si, (2, 3, 0), 200, 6.0)
    ha, hb = pattern.crossing_hkl()
    args = (si.basis, pattern.zone, pattern.x_axis, pattern.beam.wave_number)
    s1, _ = strain_precision(*args, ha, hb, 0.005)
    s2, _ = strain_precision(*args, ha, hb, 0.010)
    np.testing.assert_allclose(s2, 2 * s1, rtol=1e-9)     # linear in sigma
    # random quarters of the crossings: variance four times larger on average
    # (1/sqrt(N)); Jensen's inequality makes the mean slightly larger still
    rng = np.random.default_rng(2)
    n = len(ha)
    ratios = []
    for _ in range(20):
        pick = rng.choice(n, n // 4, replace=False)
        s, _ = strain_precision(*args, ha[pick], hb[pick], 0.005)
        ratios.append((s / s1) ** 2)
    mean_ratio = np.mean(ratios, axis=0)
    assert np.all(mean_ratio > 3.6) and np.all(mean_ratio < 5.0)


def test_sample_frame_components(si):
    # in a frame rotated 90 deg about z, exx and eyy trade places
    axes = np.array([[0, 1.0, 0], [-1.0, 0, 0], [0, 0, 1.0]])
    ref = survey_axis(si, (2, 3, 0)).sigma_strain
    rot = survey_axis(si, (2, 3, 0), axes=axes).sigma_strain
    np.testing.assert_allclose(rot[[0, 1, 2, 5]], ref[[1, 0, 2, 5]], rtol=1e-6)


def test_near_keeps_distinct_tilts(si):
    zones, tilts = candidate_axes(si, 4, near=(0, 0, 1), max_tilt_deg=15)
    assert (0, 0, 1) == tuple(zones[0]) and tilts[0] == 0
    assert {(1, 0, 4), (-1, 0, 4), (0, 1, 4), (0, -1, 4)} <= set(map(tuple, zones))
    assert np.all(tilts <= 15)


@pytest.mark.parametrize("kwargs, message", [
    (dict(near=(0, 0, 0), max_tilt_deg=10), "not all zero"),
    (dict(near=(1, 1, 10), max_tilt_deg=0.5, max_index=3), "widen"),
    (dict(max_index=40), "cap"),
    (dict(component="ezy"), "unknown component"),
])
def test_bad_input(si, kwargs, message):
    with pytest.raises(InputError, match=message):
        survey(si, **kwargs)


def test_cli_survey(tmp_path, capsys):
    out, fig = tmp_path / "s.json", tmp_path / "s.png"
    code = main(["survey", "Si", "--max-index", "3", "--json", str(out), "--figure", str(fig),
                 "--top", "5"])
    assert code == 0
    doc = json.loads(out.read_text())
    assert doc["schema"] == "laueline.survey/1"
    for key in ["structure", "kv", "disk_mrad", "sigma_mrad", "frame", "ranked_by", "axes"]:
        assert key in doc
    axis = doc["axes"][0]
    for key in ["zone", "tilt_deg", "n_lines", "n_crossings", "ring_radius_mrad",
                "max_convergence_mrad", "overlap", "sigma_strain", "score"]:
        assert key in axis
    scores = [a["score"] for a in doc["axes"] if a["score"] is not None]
    assert scores[0] == min(scores)
    capsys.readouterr()
    code = None
    try:
        code = main(["survey", "Si", "--component", "eqq"])
    except SystemExit as exc:
        code = exc.code
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1
