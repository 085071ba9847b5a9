"""Uncertainties of refine under the per-line error model, checked by Monte Carlo.

Crossings come from the independent Ewald construction of tests/conftest.py;
the per-line offsets are made there too: an offset of a line is a constant
excitation error eps_l added to its Bragg condition s_g = eps_l, whose effect
on each crossing is found by solving both lines' conditions again (not from
laueline's loading of line offsets).
"""

import numpy as np
from conftest import (DETECTOR, electron_wave_number, ewald_frame, ewald_points,
                      excitation_error)
from laueline import read_crystal
from laueline.fit import Calibration, refine
from laueline.points import Points
from laueline.survey import strain_precision

ZONE, X_AXIS = (2, 3, 0), (0, 0, 4)
SCALE = DETECTOR.scale_px_per_mrad
CAL = Calibration(200.0, DETECTOR)
POINT_PX, LINE_PX = 0.1, 0.4   # invented: line offsets dominate, as in real patterns


def _offset_response(crystal, points):
    """Per crossing: d t (mrad) / d delta (px) for a shift of each line along its normal.

    Built on the Ewald route: the Bragg condition of line a becomes
    s_a(t) = eps_a, with eps_a = |grad_t s_a| delta (a shift delta across
    the line); to first order the crossing moves by G^-1 eps, G the 2 x 2
    matrix of both conditions' gradients (central differences of the
    excitation error).  Returns the response (n, 2, 2) [crossing,
    coordinate, line a/b] and the line index of each crossing's two lines.
    """
    K = electron_wave_number(200.0)
    frame = ewald_frame(crystal.basis, ZONE, X_AXIS)
    recip = np.linalg.inv(crystal.basis).T
    t_all = DETECTOR.to_mrad(points.xy_px) * 1e-3
    out = np.empty((len(t_all), 2, 2))
    h = 1e-7  # rad: central-difference step (errors ~h^2, far below 1e-9)
    steps = np.array([[h, 0.0], [0.0, h]])
    for k, (ha, hb, t0) in enumerate(zip(points.hkl_a, points.hkl_b, t_all)):
        G = np.array([[(excitation_error(t0 + d, g, frame, K) -
                        excitation_error(t0 - d, g, frame, K)) / (2 * h) for d in steps]
                      for g in (recip @ ha.astype(float), recip @ hb.astype(float))])
        # a shift of 1 px is 1e-3 / SCALE rad across the line; the crossing moves
        # by G^-1 (|grad s| shift) rad, 1e3 times that in mrad
        out[k] = np.linalg.solve(G, np.diag(np.linalg.norm(G, axis=1))) / SCALE
    labels = np.concatenate([points.hkl_a, points.hkl_b])
    _, index = np.unique(labels, axis=0, return_inverse=True)
    return out, index.ravel().reshape(2, -1).T


def _trial_points(points, response, lines, rng):
    delta = rng.normal(0.0, LINE_PX, lines.max() + 1)
    t = DETECTOR.to_mrad(points.xy_px) + np.einsum("nij,nj->ni", response, delta[lines])
    xy = DETECTOR.to_pixels(t) + rng.normal(0.0, POINT_PX, points.xy_px.shape)
    return Points(xy, points.hkl_a, points.hkl_b, np.full(len(xy), POINT_PX))


def test_reported_sigma_matches_the_scatter_with_line_offsets():
    # 200 trials of per-line offsets plus point noise; each fit holds the
    # calibration's detector and voltage (the six strain components free): about
    # 0.04 s a fit, 8 s in all on an unloaded core
    si = read_crystal("Si")
    points = ewald_points(si, ZONE, X_AXIS, np.zeros(6), DETECTOR, n=30)
    response, lines = _offset_response(si, points)
    rng = np.random.default_rng(11)
    fits = [refine(si, ZONE, _trial_points(points, response, lines, rng), x_axis=X_AXIS,
                   calibration=CAL, mirror=False, line_sigma_px=LINE_PX,
                   hold=("center", "rotation"))
            for _ in range(200)]
    assert all(f.success for f in fits)
    strains = np.array([f.strain_voigt for f in fits])
    scatter = strains.std(axis=0, ddof=1)
    reported = np.mean([np.sqrt(np.diag(f.strain_covariance_statistical)) for f in fits],
                       axis=0)
    # the standard deviation of 200 samples is itself uncertain by 1/sqrt(2 * 199)
    # = 5 %; 20 % is four of those
    np.testing.assert_allclose(reported, scatter, rtol=0.20)
    # the test can fail: treating the crossings as independent (line term off,
    # point sigma from the scatter) reports sigmas well below the scatter
    one = _trial_points(points, response, lines, rng)
    naive = refine(si, ZONE, Points(one.xy_px, one.hkl_a, one.hkl_b), x_axis=X_AXIS,
                   calibration=CAL, mirror=False, line_sigma_px=0.0, hold=("center", "rotation"))
    naive_sigma = np.sqrt(np.diag(naive.strain_covariance_statistical))
    assert np.all(naive_sigma < 0.8 * scatter)


def test_estimated_line_sigma_recovers_the_offsets():
    # REML (Patterson and Thompson 1971) on 30 trials: the mean estimate of the
    # line sigma within 15 % of the truth (one trial: ~20 lines, about 1/sqrt(2*20)
    # = 16 % each, 3 % for the mean of 30), and the point sigma from the
    # scatter within lines (Searle et al. 1992, ch. 3) within 15 % as well
    si = read_crystal("Si")
    points = ewald_points(si, ZONE, X_AXIS, np.zeros(6), DETECTOR, n=30)
    response, lines = _offset_response(si, points)
    rng = np.random.default_rng(5)
    est, point = [], []
    for _ in range(30):
        p = _trial_points(points, response, lines, rng)
        fit = refine(si, ZONE, Points(p.xy_px, p.hkl_a, p.hkl_b), x_axis=X_AXIS,
                     calibration=CAL, mirror=False)
        assert fit.line_sigma.source == "estimated"
        est.append(fit.line_sigma.value)
        point.append(fit.line_sigma.point_sigma_px)
    assert abs(np.mean(est) / LINE_PX - 1) < 0.15
    assert abs(np.mean(point) / POINT_PX - 1) < 0.15


def test_refine_sigma_is_the_survey_prediction():
    # the same crossings and noise model: refine (calibration held) and the
    # survey's strain_precision share residual_covariance and gls_covariance;
    # they differ only by finite-difference Jacobians (steps 1e-6 and 1e-5):
    # agreement to 1 %
    si = read_crystal("Si")
    points = ewald_points(si, ZONE, X_AXIS, np.zeros(6), DETECTOR, n=30)
    p = Points(points.xy_px, points.hkl_a, points.hkl_b, np.full(len(points.xy_px), 0.2))
    fit = refine(si, ZONE, p, x_axis=X_AXIS, calibration=CAL, mirror=False, line_sigma_px=0.5)
    sigma, _ = strain_precision(si.basis, ZONE, X_AXIS, fit.wave_number, points.hkl_a,
                                points.hkl_b, 0.2 / SCALE, line_sigma_mrad=0.5 / SCALE)
    reported = np.sqrt(np.diag(fit.strain_covariance_statistical))
    np.testing.assert_allclose(reported, sigma, rtol=0.01)
