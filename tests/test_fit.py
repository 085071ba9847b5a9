"""The fit engine on one pattern: round trips, uncertainties, calibration, a published
alloy case, outliers and bad input."""

import math

import numpy as np
import pytest
from conftest import DETECTOR, synthetic_points

from laueline.errors import InputError
from laueline.fit import refine
from laueline.strain import (cubic_stiffness, from_voigt, green_lagrange, small_strain, stress,
                             voigt)

E_TRUE = np.array([2.0e-3, -1.5e-3, 1.0e-3, 5.0e-4, -7.0e-4, 3.0e-4])
# the fit reports the Green-Lagrange tensor of the basis (I + e) A: E = e + e^2 / 2
GL_TRUE = voigt(from_voigt(E_TRUE) + from_voigt(E_TRUE) @ from_voigt(E_TRUE) / 2)
ZONE = (2, 3, 0)
CAL = (200.0, DETECTOR)


def test_round_trip_labelled(si):
    pts = synthetic_points(si, ZONE, strain=E_TRUE)
    r = refine(si, ZONE, pts, x_axis=(0, 0, 4), center_px=(250, 250), scale_px_per_mrad=41,
               rotation_deg=15)
    # noise-free: the target is 1e-6; the solution is exact to rounding
    np.testing.assert_allclose(r.values[:6], GL_TRUE, atol=1e-9)
    assert r.detector.center_px == pytest.approx(DETECTOR.center_px, abs=1e-6)
    assert r.detector.scale_px_per_mrad == pytest.approx(40.0, rel=1e-8)
    assert r.detector.rotation_deg == pytest.approx(17.0, abs=1e-6)
    assert r.rms_px < 1e-6 and r.converged
    # the strain report reproduces the input exactly: U - I = e for basis (I + e) A
    np.testing.assert_allclose(voigt(r.strain.small), E_TRUE, atol=1e-6)


def test_round_trip_unlabelled(si):
    # scale known, rotation and centre unknown, mirror known: searched
    pts = synthetic_points(si, ZONE, strain=E_TRUE, labelled=False)
    r = refine(si, ZONE, pts, x_axis=(0, 0, 4), scale_px_per_mrad=40.0, hold=["scale"],
               mirror=False)
    np.testing.assert_allclose(r.values[:6], GL_TRUE, atol=1e-9)
    assert r.n_used == 40 and r.detector.rotation_deg == pytest.approx(17.0, abs=1e-6)
    assert any("orientation found by search" in w for w in r.warnings)
    # every assignment is reported with its two reflections
    assert all(np.any(p.hkl_a) and np.any(p.hkl_b) for p in r.points)


def test_unlabelled_symmetry_ambiguity_is_reported(si):
    # [2 3 0] contains the mirror z -> -z of m-3m: with the detector mirror
    # unknown, the mirrored assignment fits equally well; it flips eyz and exz.
    pts = synthetic_points(si, ZONE, strain=E_TRUE, labelled=False)
    r = refine(si, ZONE, pts, x_axis=(0, 0, 4), scale_px_per_mrad=40.0, hold=["scale"])
    assert any("equally well" in w for w in r.warnings)
    mirrored = GL_TRUE * np.array([1, 1, 1, -1, -1, 1])
    assert np.allclose(r.values[:6], GL_TRUE, atol=1e-9) or \
        np.allclose(r.values[:6], mirrored, atol=1e-9)


def test_voltage_calibration(si):
    pts = synthetic_points(si, ZONE, kv=197.3)
    r = refine(si, ZONE, pts, kv=200.0, model="fixed", free=["kv"], x_axis=(0, 0, 4))
    # the target is 0.05 kV on noise-free data
    assert r.kv == pytest.approx(197.3, abs=0.05)
    assert r.kv_sigma is not None and "kv" in r.parameters


def test_uncertainties_match_monte_carlo_scatter(si):
    # 100 noisy repeats (0.1 px): the reported sigma must match the observed
    # scatter within 28 % (the scatter of a standard deviation from 100
    # samples is about 7 %, so 28 % is four of those).
    rng = np.random.default_rng(7)
    estimates, reported = [], []
    for _ in range(100):
        pts = synthetic_points(si, ZONE, strain=E_TRUE, noise_px=0.1, rng=rng)
        r = refine(si, ZONE, pts, x_axis=(0, 0, 4), calibration=CAL, mirror=False)
        estimates.append(r.values)
        reported.append(r.sigmas)
    observed = np.std(estimates, axis=0, ddof=1)
    predicted = np.sqrt(np.mean(np.square(reported), axis=0))
    np.testing.assert_allclose(predicted / observed, 1.0, atol=0.28)
    # and the estimates are unbiased within their scatter (3 standard errors)
    bias = np.mean(estimates, axis=0)[:6] - GL_TRUE
    assert np.all(np.abs(bias) < 3 * observed[:6] / math.sqrt(100))


def test_pseudomorphic_sige_on_si(si):
    # Relaxed Si(1-x)Ge(x): Vegard's law with bowing, a(x) = 5.431 + 0.1992 x
    # + 0.02733 x^2 A (Dismukes, Ekstrom and Paff, J. Phys. Chem. 68 (1964)
    # 3021; coefficients from memory).  Pseudomorphic on Si(001): a_par = a_Si
    # and eps_perp = -2 C12 / C11 eps_par with Si elastic constants C11 = 165.7,
    # C12 = 63.9, C44 = 79.6 GPa (Hopcroft, Nix and Kenny, J. MEMS 19 (2010)
    # 229, after McSkimin 1953; from memory).
    c11, c12, c44 = 165.7, 63.9, 79.6
    x_true = 0.20
    a_si = si.cell[0]

    def vegard(x):
        return 5.431 + 0.1992 * x + 0.02733 * x * x

    a_rel = vegard(x_true)
    eps_par = a_si / a_rel - 1
    a_perp = a_rel * (1 - 2 * c12 / c11 * eps_par)
    layer = si.with_cell(a_si, a_si, a_perp, 90, 90, 90)
    rng = np.random.default_rng(11)
    # zone [2 3 0], the tetragonal axis along the disk x axis (004)
    pts = synthetic_points(layer, ZONE, n=40, noise_px=0.1, rng=rng)
    fit = refine(si, ZONE, pts, model="tetragonal", calibration=CAL, mirror=False,
                 x_axis=(0, 0, 4))
    (a_fit, sa), (c_fit, sc) = fit.parameter("a"), fit.parameter("c")
    # the target is 1e-4 relative precision of a and c from such data
    assert sa / a_fit < 1e-4 and sc / c_fit < 1e-4
    assert abs(a_fit - a_si) < 3 * sa and abs(c_fit - a_perp) < 3 * sc
    # composition from the fitted cell
    r = c12 / c11
    a_rel_fit = (c_fit + 2 * r * a_fit) / (1 + 2 * r)
    da = np.array([2 * r, 1]) / (1 + 2 * r)
    cov_ac = fit.covariance[np.ix_([fit.parameters.index("a"), fit.parameters.index("c")],
                                   [fit.parameters.index("a"), fit.parameters.index("c")])]
    s_arel = math.sqrt(da @ cov_ac @ da)
    x_fit = (-0.1992 + math.sqrt(0.1992 ** 2 + 4 * 0.02733 * (a_rel_fit - 5.431))) / (2 * 0.02733)
    s_x = s_arel / (0.1992 + 2 * 0.02733 * x_fit)
    assert abs(x_fit - x_true) < 3 * s_x and s_x < 0.01
    # stress against the relaxed alloy: plane stress, szz = 0 within its sigma,
    # and the biaxial value sxx = (C11 + C12 - 2 C12^2 / C11) eps_par
    relaxed = si.with_cell(a_rel_fit, a_rel_fit, a_rel_fit, 90, 90, 90)
    st = refine(relaxed, ZONE, pts, model="tetragonal", calibration=CAL, mirror=False,
                x_axis=(0, 0, 4), stiffness=cubic_stiffness(c11, c12, c44)).strain
    assert abs(st.stress_GPa[2, 2]) < 3 * st.stress_sigma_GPa[2, 2]
    biaxial = (c11 + c12 - 2 * c12 ** 2 / c11) * eps_par
    assert abs(st.stress_GPa[0, 0] - biaxial) < 3 * st.stress_sigma_GPa[0, 0] + 0.02 * abs(biaxial)


def test_green_lagrange_small_strain_and_rotations():
    rng = np.random.default_rng(3)
    A0 = np.diag([5.43, 5.43, 5.43])
    e = rng.normal(0, 1e-3, (3, 3))
    e = (e + e.T) / 2
    A = (np.eye(3) + e) @ A0
    E, eps = green_lagrange(A0, A), small_strain(A0, A)
    # E = eps + eps^2 / 2 exactly for a symmetric stretch (second order)
    np.testing.assert_allclose(E, eps + eps @ eps / 2, atol=1e-15)
    assert np.max(np.abs(E - eps)) < 2 * np.max(np.abs(eps)) ** 2
    np.testing.assert_allclose(eps, e, atol=1e-15)
    from scipy.spatial.transform import Rotation

    Q = Rotation.from_rotvec([0.2, -0.4, 0.9]).as_matrix()
    np.testing.assert_allclose(green_lagrange(A0, Q @ A), E, atol=1e-15)
    np.testing.assert_allclose(small_strain(A0, Q @ A), eps, atol=1e-15)


def test_hooke_hydrostatic():
    # Under hydrostatic strain e, a cubic crystal carries sigma = (C11 + 2 C12) e
    # on the diagonal (bulk modulus (C11 + 2 C12) / 3; Nye 1985)
    C = cubic_stiffness(165.7, 63.9, 79.6)
    s = stress(np.eye(3) * 1e-3, C)
    np.testing.assert_allclose(s, np.eye(3) * (165.7 + 2 * 63.9) * 1e-3, atol=1e-12)
    # pure shear exy = g/2 gives sxy = C44 * 2 exy (engineering shear in Voigt form)
    s = stress(np.array([[0, 1e-3, 0], [1e-3, 0, 0], [0, 0, 0]]), C)
    assert s[0, 1] == pytest.approx(79.6 * 2e-3)


def test_robust_lists_outlier(si):
    pts = synthetic_points(si, ZONE, strain=E_TRUE, noise_px=0.1,
                           rng=np.random.default_rng(5))
    pts.xy_px[3] += [6.0, -4.0]
    r = refine(si, ZONE, pts, x_axis=(0, 0, 4), calibration=CAL, mirror=False, robust=True)
    assert not r.points[3].used and "outlier" in r.points[3].note
    assert r.n_used == 39
    assert np.all(np.abs(r.values[:6] - GL_TRUE) < 4 * r.sigmas[:6])


def test_sigma_px_chi_square_check(si):
    pts = synthetic_points(si, ZONE, strain=E_TRUE, noise_px=0.3, rng=np.random.default_rng(9))
    pts.sigma_px = np.full(len(pts), 0.1)  # stated three times too small
    r = refine(si, ZONE, pts, x_axis=(0, 0, 4), calibration=CAL, mirror=False)
    assert r.chi2 is not None and any("chi-square" in w for w in r.warnings)


def test_strain_and_kv_together_refused(si):
    pts = synthetic_points(si, ZONE)
    with pytest.raises(InputError, match="same way"):
        refine(si, ZONE, pts, free=["kv"], x_axis=(0, 0, 4))
    with pytest.raises(InputError, match="same way"):
        refine(si, ZONE, pts, model="cubic", free=["kv"], x_axis=(0, 0, 4))


def test_too_few_points(si):
    pts = synthetic_points(si, ZONE, n=3)
    with pytest.raises(InputError, match="observations"):
        refine(si, ZONE, pts, x_axis=(0, 0, 4))


def test_collinear_points(si):
    pts = synthetic_points(si, ZONE, n=10)
    pts.xy_px[:, 1] = 3 * pts.xy_px[:, 0] + 1
    with pytest.raises(InputError, match="collinear"):
        refine(si, ZONE, pts, x_axis=(0, 0, 4))


def test_labels_absent_or_parallel(si):
    pts = synthetic_points(si, ZONE, n=12)
    pts.hkl_a[0] = [2, 0, 0]
    with pytest.raises(InputError, match="absent"):
        refine(si, ZONE, pts, x_axis=(0, 0, 4))
    pts = synthetic_points(si, ZONE, n=12)
    pts.hkl_b[0] = pts.hkl_a[0]
    with pytest.raises(InputError, match="parallel"):
        refine(si, ZONE, pts, x_axis=(0, 0, 4))


def test_unlabelled_noisy_matches_labelled(si):
    # the same noisy points, with and without labels, give the same fit once
    # the assignment has settled (0.1 px noise, calibration held).  Where three
    # lines meet almost at one point a point may take the other crossing; the
    # report must say so, and the fit moves by a small fraction of a sigma.
    pts = synthetic_points(si, ZONE, strain=E_TRUE, noise_px=0.1, rng=np.random.default_rng(3))
    bare = type(pts)(pts.xy_px.copy())
    a = refine(si, ZONE, pts, x_axis=(0, 0, 4), calibration=CAL, mirror=False)
    b = refine(si, ZONE, bare, x_axis=(0, 0, 4), calibration=CAL, mirror=False)
    assert np.all(np.abs(b.values - a.values) < 0.2 * a.sigmas)
    assert b.assigned and not a.assigned
    differ = [i for i, (pa, pb) in enumerate(zip(a.points, b.points))
              if {tuple(pa.hkl_a), tuple(pa.hkl_b)} != {tuple(pb.hkl_a), tuple(pb.hkl_b)}]
    assert all("ambiguous" in b.points[i].note for i in differ)
    if differ:
        assert any("ambiguous" in w for w in b.warnings)


def test_parameter_covariance_is_the_generalised_least_squares_formula():
    # Aitken (1935): for residual covariance S, cov = (J^T S^-1 J)^-1, here by
    # plain matrix inversion; correlated S as a per-line offset shared by
    # several values would give (the seam for a per-line error model)
    from laueline.fit import parameter_covariance

    rng = np.random.default_rng(1)
    J = rng.normal(size=(12, 3)) * [1.0, 1e3, 1e-3]   # columns of very different units
    shared = np.kron(np.eye(4), np.ones((3, 3))) * 0.5
    S = np.eye(12) * 0.2 + shared
    expected = np.linalg.inv(J.T @ np.linalg.inv(S) @ J)
    np.testing.assert_allclose(parameter_covariance(J, S), expected, rtol=1e-10)
    # independent values may be given as variances
    v = rng.uniform(0.5, 2.0, 12)
    np.testing.assert_allclose(parameter_covariance(J, v),
                               np.linalg.inv(J.T @ np.diag(1 / v) @ J), rtol=1e-10)


def test_distortion_freed_on_a_reference_and_held_after(si):
    # an elliptical projector distortion (1 % and -0.5 %) on both records;
    # crossings by the independent Ewald construction
    from conftest import ewald_points, green_lagrange_of

    det = DETECTOR.replace(distortion=(0.01, -0.005))
    ref = ewald_points(si, ZONE, (0, 0, 4), [0] * 6, det)
    cal = refine(si, ZONE, ref, x_axis=(0, 0, 4), model="fixed", free=["kv", "distortion"])
    # noise-free: recovered to the solver's precision
    assert cal.detector.distortion == pytest.approx((0.01, -0.005), abs=1e-7)
    assert cal.kv == pytest.approx(200.0, abs=1e-4)
    strained = ewald_points(si, ZONE, (0, 0, 4), E_TRUE, det)
    fit = refine(si, ZONE, strained, x_axis=(0, 0, 4), calibration=cal.calibration())
    assert not any(n in fit.parameters for n in ("e1", "e2", "scale", "kv"))
    assert fit.detector.distortion == cal.detector.distortion
    np.testing.assert_allclose(fit.strain_voigt, green_lagrange_of(E_TRUE), atol=1e-7)


def test_line_table_and_excluded_lines(si):
    from conftest import ewald_points

    pts = ewald_points(si, ZONE, (0, 0, 4), E_TRUE, DETECTOR, noise_px=0.1,
                       rng=np.random.default_rng(6))
    fit = refine(si, ZONE, pts, x_axis=(0, 0, 4), calibration=CAL, mirror=False)
    table = {tuple(r.hkl): r for r in fit.patterns[0].line_table}
    # each line counts the crossings it takes part in (counted here from the labels)
    labels = [tuple(h) for h in np.concatenate([pts.hkl_a, pts.hkl_b])]
    assert {h: labels.count(h) for h in set(labels)} == {h: r.n for h, r in table.items()}
    # residuals of 0.1 px noise, normalised by the estimated scatter: of order 1
    assert all(r.rms_px < 0.5 and r.normalised_rms < 3 for r in table.values())
    busiest = max(table, key=lambda h: table[h].n)
    out = refine(si, ZONE, pts, x_axis=(0, 0, 4), calibration=CAL, mirror=False,
                 exclude_lines=[busiest])
    p = out.patterns[0]
    assert busiest not in {tuple(r.hkl) for r in p.line_table}
    assert p.n_used == len(pts) - table[busiest].n and p.excluded == (busiest,)
    assert all("excluded" in r.note for r in p.points if not r.used)
