"""The per-line error model against dense algebra, textbook estimators and Monte Carlo."""

import math

import numpy as np
import pytest

from laueline import predict
from laueline.errors import InputError
from laueline.survey import kinematic_contrast, strain_precision, survey_axis
from laueline.thickness import kinematic_extinction_distance_nm
from laueline.uncertainty import (
    add_systematic,
    combine,
    crossing_loading,
    estimate_line_sigma,
    gls_covariance,
    gls_solve,
    line_point_loading,
    predicted_covariance,
    residual_covariance,
)


def _random_crossings(rng, n_crossings, n_lines):
    angles = rng.uniform(0, np.pi, n_lines)
    normals = np.stack([np.cos(angles), np.sin(angles)], axis=1)
    la = rng.integers(0, n_lines, n_crossings)
    lb = (la + rng.integers(1, n_lines, n_crossings)) % n_lines
    return normals, la, lb


# -- the structured covariance against dense linear algebra ----------------

def test_woodbury_solve_and_determinant_match_dense():
    # Reference: numpy's dense solve and slogdet of the same matrix built
    # explicitly (Woodbury identity and determinant lemma are exact).
    rng = np.random.default_rng(1)
    normals, la, lb = _random_crossings(rng, 100, 20)
    loading = crossing_loading(normals[la], normals[lb], la, lb, 20)
    point = rng.uniform(0.3, 0.6, 200)
    cov = residual_covariance(loading, point, rng.uniform(0, 0.4, 20))
    dense = cov.dense()
    b = rng.normal(size=(200, 3))
    # tolerance: rounding of a condition number up to ~1e6 (near-parallel pairs)
    np.testing.assert_allclose(cov.solve(b), np.linalg.solve(dense, b), rtol=1e-7, atol=1e-9)
    assert cov.logdet() == pytest.approx(np.linalg.slogdet(dense)[1], rel=1e-10)


def test_crossing_of_a_small_angle_pair_moves_along_the_other_line():
    # Elementary geometry: shifting line a by delta along its normal moves its
    # crossing with line b along b, by delta / sin(angle between the lines).
    for angle_deg in (90.0, 30.0, 5.0):
        a = math.radians(angle_deg)
        na = np.array([[1.0, 0.0]])
        nb = np.array([[math.cos(a), math.sin(a)]])
        m = crossing_loading(na, nb, [0], [1], 2)
        shift = m[:, 0]
        direction_b = np.array([-nb[0, 1], nb[0, 0]])
        assert abs(shift @ nb[0]) < 1e-12                       # stays on line b
        assert np.linalg.norm(shift) == pytest.approx(1 / math.sin(a), rel=1e-12)
        assert abs(abs(shift @ direction_b) - 1 / math.sin(a)) < 1e-9


def test_points_along_lines_share_the_offset():
    loading = line_point_loading([0, 0, 1, 2, 2, 2])
    cov = residual_covariance(loading, 0.1, [0.2, 0.3, 0.4]).dense()
    # one-way random-effects structure (Searle et al. 1992, ch. 3)
    assert cov[0, 1] == pytest.approx(0.04) and cov[3, 5] == pytest.approx(0.16)
    assert cov[1, 2] == 0 and cov[2, 2] == pytest.approx(0.01 + 0.09)


def test_extra_factor_adds_its_outer_product():
    loading = line_point_loading([0, 0, 1])
    base = residual_covariance(loading, 0.1, 0.2)
    extra = np.array([[1.0], [2.0], [0.0]])
    np.testing.assert_allclose(base.with_factor(extra).dense(),
                               base.dense() + extra @ extra.T, rtol=1e-12)


def test_combined_observations_correlate_through_shared_lines():
    na = np.array([[1.0, 0.0]])
    nb = np.array([[0.0, 1.0]])
    crossings = residual_covariance(crossing_loading(na, nb, [0], [1], 2), 0.1, 0.5)
    points = residual_covariance(line_point_loading([0, 1], 2), 0.1, 0.5)
    dense = combine(crossings, points).dense()
    # the crossing's x moves with line 0 (normal along x), exactly as its point
    assert dense[0, 2] == pytest.approx(0.25) and dense[1, 3] == pytest.approx(0.25)
    assert dense[0, 3] == 0


def test_gls_covariance_matches_dense_formula_and_ordinary_least_squares():
    # Gauss-Markov: (J^T V^-1 J)^-1, and sigma^2 (J^T J)^-1 when V = sigma^2 I.
    rng = np.random.default_rng(2)
    normals, la, lb = _random_crossings(rng, 120, 25)
    loading = crossing_loading(normals[la], normals[lb], la, lb, 25)
    jac = rng.normal(size=(240, 7))
    cov = residual_covariance(loading, 0.5, 0.3)
    ref = np.linalg.inv(jac.T @ np.linalg.solve(cov.dense(), jac))
    np.testing.assert_allclose(gls_covariance(jac, cov), ref, rtol=1e-8)
    np.testing.assert_allclose(gls_covariance(jac, cov.dense()), ref, rtol=1e-8)
    ols = gls_covariance(jac, residual_covariance(loading, 0.5, 0.0))
    np.testing.assert_allclose(ols, 0.25 * np.linalg.inv(jac.T @ jac), rtol=1e-10)
    np.testing.assert_allclose(predicted_covariance(jac, loading, 0.5, 0.3), ref, rtol=1e-8)
    r = rng.normal(size=240)
    step, _ = gls_solve(jac, r, cov)
    np.testing.assert_allclose(step, ref @ jac.T @ np.linalg.solve(cov.dense(), r), rtol=1e-7)


def test_undetermined_parameters_are_refused():
    jac = np.ones((10, 2))
    with pytest.raises(InputError, match="not all determined"):
        gls_covariance(jac, np.ones(10), names=["strain", "voltage"])
    with pytest.raises(InputError, match="parallel"):
        crossing_loading([[1.0, 0]], [[1.0, 0]], [0], [1])


# -- estimating the line sigma ---------------------------------------------

@pytest.mark.parametrize("method", ["reml", "moments"])
def test_line_sigma_balanced_one_way_closed_form(method):
    # Balanced one-way classification with known within-line variance
    # (Searle, Casella and McCulloch 1992, ch. 3): both estimators reduce to
    # s^2 = sum (mean_a - grand mean)^2 / (k - 1) - sigma_p^2 / n.
    rng = np.random.default_rng(3)
    k, n, sp, sl = 30, 8, 0.2, 0.15
    index = np.repeat(np.arange(k), n)
    y = 1.7 + rng.normal(0, sl, k)[index] + rng.normal(0, sp, k * n)
    means = y.reshape(k, n).mean(axis=1)
    expected = math.sqrt(max(np.var(means, ddof=1) - sp ** 2 / n, 0.0))
    est = estimate_line_sigma(y, line_point_loading(index), sp, np.ones((k * n, 1)),
                              method=method)
    # the optimiser's tolerance (1e-6 of the bracket) is far below this
    assert est.line_sigma == pytest.approx(expected, rel=1e-3)
    assert est.determined and est.dof == k * n - 1


def test_line_sigma_recovered_from_crossings_with_a_fit():
    # Mean of the estimates over 30 data sets within 10 % of the true value
    # (each estimate scatters by ~10 %, so the mean by ~2 %), and zero
    # returned when there is no line term: the estimator is not biased by
    # the parameters the fit absorbs.
    rng = np.random.default_rng(4)
    normals, la, lb = _random_crossings(rng, 150, 20)
    loading = crossing_loading(normals[la], normals[lb], la, lb, 20)
    jac = rng.normal(size=(300, 6))
    estimates = []
    for _ in range(30):
        y = loading @ rng.normal(0, 0.3, 20) + rng.normal(0, 0.2, 300) + jac @ rng.normal(size=6)
        estimates.append(estimate_line_sigma(y, loading, 0.2, jac).line_sigma)
    assert np.mean(estimates) == pytest.approx(0.3, rel=0.1)
    zero = [estimate_line_sigma(rng.normal(0, 0.2, 300), loading, 0.2, jac).line_sigma
            for _ in range(10)]
    assert np.median(zero) < 0.05  # a small fraction of the point sigma


# -- statistical and systematic parts ----------------------------------------

def test_systematic_adds_to_statistical():
    stat = np.array([[16.0, 1.0], [1.0, 9.0]])
    parts = add_systematic(stat, [3.0, 0.0])
    np.testing.assert_allclose(parts.sigma_total, [5.0, 3.0])      # 3-4-5 triangle
    np.testing.assert_allclose(parts.sigma_statistical, [4.0, 3.0])
    np.testing.assert_allclose(parts.sigma_systematic, [3.0, 0.0])
    assert add_systematic(stat).systematic.sum() == 0
    rotated = parts.transformed(np.array([[0, 1.0], [1.0, 0]]))
    np.testing.assert_allclose(rotated.sigma_total, [3.0, 5.0])
    with pytest.raises(InputError):
        add_systematic(stat, np.ones((3, 3)))


# -- Monte Carlo of a full fit on crossings built without lines.py -----------

def _frame_by_hand(basis, zone, x_axis):
    """x, y, B from the definitions of DESIGN.md (not laueline.frame)."""
    beam = basis @ np.asarray(zone, float)
    beam /= np.linalg.norm(beam)
    gx = np.linalg.solve(basis.T, np.asarray(x_axis, float))  # A^-T h
    gx -= (gx @ beam) * beam
    gx /= np.linalg.norm(gx)
    return np.array([gx, np.cross(beam, gx), beam])


def _ewald_crossings(basis, zone, x_axis, K, hkl_a, hkl_b, offsets_a, offsets_b, start):
    """Crossings (mrad) of lines shifted along their in-plane normals, by Newton
    on the excitation errors s_g = (K^2 - |k + g|^2) / 2K with a numerical Jacobian.
    """
    frame = _frame_by_hand(basis, zone, x_axis)
    recip = np.linalg.inv(basis).T
    ga, gb = hkl_a @ recip.T @ frame.T, hkl_b @ recip.T @ frame.T   # frame components
    na = ga[:, :2] / np.linalg.norm(ga[:, :2], axis=1, keepdims=True)
    nb = gb[:, :2] / np.linalg.norm(gb[:, :2], axis=1, keepdims=True)

    def s(t, g, n, delta):
        u = t - delta[:, None] * n
        k = K * np.concatenate([u, -np.sqrt(1 - np.sum(u * u, axis=1, keepdims=True))], 1)
        return (K * K - np.sum((k + g) ** 2, axis=1)) / (2 * K)

    def f(t):
        return np.stack([s(t, ga, na, offsets_a), s(t, gb, nb, offsets_b)], axis=1)

    t = start * 1e-3
    h = 1e-8
    for _ in range(6):
        f0 = f(t)
        jx = (f(t + [h, 0]) - f0) / h
        jy = (f(t + [0, h]) - f0) / h
        jac = np.stack([jx, jy], axis=2)             # (p, 2 equations, 2 unknowns)
        t = t - np.linalg.solve(jac, f0[..., None])[..., 0]
    return t * 1e3


def _voigt_unit(k, step):
    e = np.zeros((3, 3))
    i, j = [(0, 0), (1, 1), (2, 2), (1, 2), (0, 2), (0, 1)][k]
    e[i, j] = e[j, i] = step
    return e


@pytest.mark.parametrize("zone", [(2, 3, 0), (3, 2, 2)])
def test_survey_prediction_matches_monte_carlo_of_a_gls_fit(si, zone):
    # Si [2 3 0] and [3 2 2] at 200 kV, 6 mrad, 200 nm: the crossings of the lines whose
    # two-beam dip exceeds 2 %.  Data: crossings of lines each shifted by a
    # random offset (sigma_l) plus point noise (sigma_p), found by Newton on
    # the excitation errors (not lines.py).  Fit: Gauss-Newton GLS of six
    # strains, centre and rotation with this test's own Jacobian and dense
    # covariance.  The survey's predicted sigma must match the fit's scatter.
    sigma_p, sigma_l, thickness = 0.005, 0.008, 200.0
    pattern = predict(si, zone, 200, 6.0)
    # visibility by the closed form sin^2(pi t / xi) of the two-beam rocking
    # curve at the Bragg condition (Hirsch et al. 1965), valid while t < xi/2
    xi = np.array([kinematic_extinction_distance_nm(si, h, 200) for h in pattern.hkl])
    assert np.all(xi > 2 * thickness)
    visible = np.sin(np.pi * thickness / xi) ** 2 >= 0.02
    keep = visible[pattern.crossing_lines].all(axis=1)
    pairs = pattern.crossing_lines[keep]
    lines = np.unique(pairs)
    col = {int(l): i for i, l in enumerate(lines)}
    ia = np.array([col[int(a)] for a in pairs[:, 0]])
    ib = np.array([col[int(b)] for b in pairs[:, 1]])
    hkl_a, hkl_b = pattern.hkl[pairs[:, 0]].astype(float), pattern.hkl[pairs[:, 1]].astype(float)
    start = pattern.crossing_mrad[keep]
    x_axis, K, A = pattern.x_axis, pattern.beam.wave_number, si.basis
    n_p, n_l = len(pairs), len(lines)
    zero = np.zeros(n_p)

    def model(e, offsets=None):
        da = zero if offsets is None else offsets[ia]
        db = zero if offsets is None else offsets[ib]
        return _ewald_crossings((np.eye(3) + e) @ A, zone, x_axis, K, hkl_a, hkl_b, da, db,
                                start)

    t0 = model(np.zeros((3, 3)))
    np.testing.assert_allclose(t0, start, atol=1e-6)   # both routes agree (mrad)
    # Jacobian: strains by central differences, then centre and rotation
    step = 1e-6
    jac = np.empty((2 * n_p, 9))
    for k in range(6):
        e = _voigt_unit(k, step)
        jac[:, k] = ((model(e) - model(-e)) / (2 * step)).ravel()
    jac[:, 6] = np.tile([1.0, 0.0], n_p)
    jac[:, 7] = np.tile([0.0, 1.0], n_p)
    jac[:, 8] = np.stack([-t0[:, 1], t0[:, 0]], axis=1).ravel()
    # loading of each line's offset, by finite differences of the solver
    loading = np.empty((2 * n_p, n_l))
    d = 1e-6  # rad
    for l in range(n_l):
        off = np.zeros(n_l)
        off[l] = d
        loading[:, l] = ((model(np.zeros((3, 3)), off) - t0) / d * 1e-3).ravel()
    dense_v = sigma_p ** 2 * np.eye(2 * n_p) + sigma_l ** 2 * loading @ loading.T
    v_inv = np.linalg.inv(dense_v)
    crb = np.linalg.inv(jac.T @ v_inv @ jac)[:6, :6]          # this test's own bound

    predicted = survey_axis(si, zone, sigma_mrad=sigma_p, line_sigma_mrad=sigma_l,
                            thickness_nm=thickness, members=False)
    assert predicted.n_crossings == n_p
    # two numerical routes to one bound: finite-difference steps, ~1e-3
    np.testing.assert_allclose(predicted.sigma_strain, np.sqrt(np.diag(crb)), rtol=0.02)

    rng = np.random.default_rng(7)
    solution = np.linalg.solve(jac.T @ v_inv @ jac, jac.T @ v_inv)
    estimates = []
    for _ in range(200):
        data = model(np.zeros((3, 3)), rng.normal(0, sigma_l * 1e-3, n_l))
        data = data + rng.normal(0, sigma_p, data.shape)
        x = np.zeros(9)
        for _ in range(2):  # Gauss-Newton with a fixed Jacobian
            e = sum(_voigt_unit(k, x[k]) for k in range(6))
            c, phi = x[6:8], x[8]
            t = model(e)
            rot = np.array([[math.cos(phi), -math.sin(phi)], [math.sin(phi), math.cos(phi)]])
            x = x + solution @ (data - (t @ rot.T + c)).ravel()
        estimates.append(x[:6])
    scatter = np.std(estimates, axis=0, ddof=1)
    # 200 trials give a standard deviation to ~5 % (1/sqrt(2 N)); 20 % is the
    # acceptance the error model is held to
    np.testing.assert_allclose(predicted.sigma_strain / scatter, 1.0, atol=0.2)
    # the independent-crossing model would be far too optimistic here
    naive = survey_axis(si, zone, sigma_mrad=sigma_p, line_sigma_mrad=0.0,
                        thickness_nm=thickness, members=False).sigma_strain
    assert np.all(scatter / naive > 1.5)


def test_strain_precision_scales_with_both_sigmas(si):
    pattern = predict(si, (2, 3, 0), 200, 6.0)
    ha, hb = pattern.crossing_hkl()
    args = (si.basis, pattern.zone, pattern.x_axis, pattern.beam.wave_number, ha, hb)
    s1, _ = strain_precision(*args, 0.005, line_sigma_mrad=0.004)
    s2, _ = strain_precision(*args, 0.010, line_sigma_mrad=0.008)
    np.testing.assert_allclose(s2, 2 * s1, rtol=1e-9)     # V scales as sigma^2
    s0, _ = strain_precision(*args, 0.005)
    assert np.all(s1 > s0)


def test_contrast_against_hirsch_two_beam_formulas(si):
    # Hirsch et al. (1965), two-beam theory without absorption: the
    # diffracted intensity at the Bragg condition is sin^2(pi t / xi_g);
    # kinematically (pi t / xi_g)^2, i.e. proportional to |F_g|^2.
    pattern = predict(si, (2, 3, 0), 200, 6.0)
    t = 200.0
    depth = kinematic_contrast(pattern, t)
    xi = np.array([kinematic_extinction_distance_nm(si, h, 200) for h in pattern.hkl])
    np.testing.assert_allclose(depth, np.sin(np.pi * t / xi) ** 2, rtol=1e-9)
    kinematic = (np.pi * t / xi) ** 2
    weak = kinematic < 0.05
    assert weak.sum() > 10
    # sin^2 x = x^2 (1 - x^2/3 + ...): relative departure below x^2 / 3
    assert np.all(np.abs(depth[weak] / kinematic[weak] - 1) < kinematic[weak] / 3 + 1e-12)
    ratio = depth[weak] / depth[weak][0]
    f2 = (pattern.f_abs[weak] / pattern.f_abs[weak][0]) ** 2
    np.testing.assert_allclose(ratio, f2, rtol=0.05)      # the x^2/3 terms, < 2 %


def test_rocking_curve_peak_beyond_half_extinction():
    from laueline.survey import rocking_curve_peak

    # t = xi / 2: full transfer at the Bragg condition
    assert rocking_curve_peak(50.0, np.array([100.0]))[0] == pytest.approx(1.0, rel=1e-12)
    # t = xi: zero at s = 0; the peak is then the first subsidiary maximum of
    # (sin u / u)^2 times u0^2 = pi^2: 0.04719 at u = 4.4934 (tan u = u), a
    # textbook value (from memory), so 0.4658; grid of 257 samples per 2 pi
    assert rocking_curve_peak(100.0, np.array([100.0]))[0] == pytest.approx(
        np.pi ** 2 * 0.047190, rel=2e-3)
