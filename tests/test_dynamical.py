"""Bloch-wave engine against closed forms, handbook values and an ODE integration."""

import dataclasses
import json
import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from laueline import predict
from laueline.dynamical import (MAX_BEAMS, bloch_amplitudes, bloch_intensities,
                                coupling_matrix, dynamical_lines, excitation_matrices,
                                potential_coefficients)
from laueline.errors import InputError
from laueline.frame import incident_wavevectors, zone_frame
from laueline.lines import line_parameters, locus_samples
from laueline.optics import relativistic_factor, wave_number
from laueline.thickness import kinematic_extinction_distance_nm


def _two_beam_directions(crystal, hkl, kv, s_values):
    """Incident vectors of the [001] disk giving excitation errors s (1/A) for g = hkl."""
    K = wave_number(kv)
    frame = zone_frame(crystal.basis, (0, 0, 1), hkl)
    g = np.linalg.norm(crystal.g_vectors([hkl])[0])
    # in-plane g along x: 2 k.g + g^2 = 2 K t g + g^2 and s = -(2 k.g + g^2) / 2K
    t_mrad = 1e3 * (-np.asarray(s_values) * 2 * K - g * g) / (2 * K * g)
    t = np.stack([t_mrad, np.zeros_like(t_mrad)], axis=1)
    return incident_wavevectors(t, frame, K), frame


def test_two_beam_rocking_curve_with_absorption(si):
    # Howie-Whelan two-beam solution with absorption (Hirsch, Howie, Nicholson, Pashley
    # and Whelan 1965, ch. 8 and 12): with the deviation parameter s measured along the
    # foil normal, xi_g = K_n/|U_g|, 1/xi'_g = a/xi_g,
    # 1/xi'_0 = a U_0/K_n and s_eff = sqrt(s^2 + (1/xi_g + i/xi'_g)^2),
    #   phi_0 = [cos(pi s_eff t) - i (s/s_eff) sin(pi s_eff t)] exp(-pi t/xi'_0)
    #   phi_g = i (1/xi_g + i/xi'_g)/s_eff sin(pi s_eff t) exp(-pi t/xi'_0)
    # up to a common phase.
    kv, a, t_nm = 200.0, 0.1, 137.0
    s = np.linspace(-0.02, 0.02, 41)  # 1/A, several fringes either side
    k, frame = _two_beam_directions(si, (2, 2, 0), kv, s)
    intensity = bloch_intensities(si, [(0, 0, 0), (2, 2, 0)], k, t_nm, kv=kv,
                                  absorption_ratio=a, foil_normal=frame.beam_direction)
    kn = -k @ frame.beam_direction
    gamma = relativistic_factor(kv)
    u_g = gamma * si.structure_factors([(2, 2, 0)])[0] / (math.pi * si.volume)
    u_mg = gamma * si.structure_factors([(-2, -2, 0)])[0] / (math.pi * si.volume)
    u_0 = gamma * si.forward_scattering() / (math.pi * si.volume)
    t = t_nm * 10
    coupling = (1 + 1j * a) * np.sqrt(u_g * u_mg + 0j) / kn   # 1/xi_g + i/xi'_g
    s = s * wave_number(kv) / kn  # deviation parameter along the foil normal
    s_eff = np.sqrt(s * s + coupling ** 2)
    damp = np.exp(-math.pi * t * a * u_0 / kn)
    phi0 = (np.cos(math.pi * s_eff * t) - 1j * s / s_eff * np.sin(math.pi * s_eff * t)) * damp
    phig = 1j * coupling / s_eff * np.sin(math.pi * s_eff * t) * damp
    # 1e-6 absolute: the target; both routes are exact to rounding
    np.testing.assert_allclose(intensity[:, 0], np.abs(phi0) ** 2, atol=1e-6, rtol=0)
    np.testing.assert_allclose(intensity[:, 1], np.abs(phig) ** 2, atol=1e-6, rtol=0)
    assert intensity[:, 1].max() > 0.05  # the reflection is really excited


def test_two_beam_thickness_periodicity(si):
    # Pendelloesung at the Bragg position without absorption: I_0 = cos^2(pi t / xi_g)
    # (Hirsch et al. 1965), so I_0 repeats every xi_g and vanishes at xi_g / 2
    kv = 200.0
    k, frame = _two_beam_directions(si, (2, 2, 0), kv, [0.0])
    kn = float(-k[0] @ frame.beam_direction)
    u = abs(potential_coefficients(si, [(2, 2, 0)], kv, 0.0)[0])
    xi_nm = kn / u / 10
    thick = np.array([0.13, 0.37, 0.5, 0.81]) * xi_nm
    i0 = np.array([bloch_intensities(si, [(0, 0, 0), (2, 2, 0)], k, t, kv=kv,
                                     absorption_ratio=0.0,
                                     foil_normal=frame.beam_direction)[0, 0] for t in thick])
    i0_next = np.array([bloch_intensities(si, [(0, 0, 0), (2, 2, 0)], k, t + xi_nm, kv=kv,
                                          absorption_ratio=0.0,
                                          foil_normal=frame.beam_direction)[0, 0]
                        for t in thick])
    np.testing.assert_allclose(i0, np.cos(np.pi * thick / xi_nm) ** 2, atol=1e-9)
    np.testing.assert_allclose(i0_next, i0, atol=1e-9)  # rounding only
    assert i0[2] < 1e-9


# Two-beam extinction distances at 100 kV, nm (Hirsch et al. 1965, Table 4.1;
# Edington, Practical Electron Microscopy in Materials Science, 1976; from memory).
HANDBOOK_XI_100KV = [("Si", (1, 1, 1), 60.2), ("Si", (2, 2, 0), 75.7), ("Si", (4, 0, 0), 126.8),
                     ("Al", (1, 1, 1), 55.6), ("Al", (2, 0, 0), 67.3)]


@pytest.mark.parametrize("name, hkl, xi_table", HANDBOOK_XI_100KV)
def test_extinction_distance_from_eigenvalue_splitting(name, hkl, xi_table):
    from laueline.crystal import read_crystal

    crystal = read_crystal(name)
    kv = 100.0
    K = wave_number(kv)
    beams = np.array([(0, 0, 0), hkl])
    matrix = coupling_matrix(crystal, beams, kv, 0.0)
    g = crystal.g_vectors(beams)
    normal = np.cross(g[1], [1.0, -2.0, 0.3])
    normal /= np.linalg.norm(normal)
    g2 = g[1] @ g[1]
    k_bragg = -math.sqrt(K * K - g2 / 4) * normal - 0.5 * g[1]  # |k| = K, 2 k.g + g^2 = 0
    matrix[np.diag_indices(2)] += excitation_matrices(g, k_bragg[None])[0]
    lam = np.linalg.eigvals(matrix)
    xi_nm = 2 * K / abs(lam[0] - lam[1]) / 10  # Delta gamma = Delta lambda / 2K = 1/xi
    # The tables used Doyle-Turner factors and room-temperature B; the Peng et al.
    # factors with this CIF's B give values a few per cent higher: 6 % allowed.
    assert xi_nm == pytest.approx(xi_table, rel=0.06)
    # the kinematic formula of laueline.thickness differs by cos(theta_B) only
    assert xi_nm == pytest.approx(kinematic_extinction_distance_nm(crystal, hkl, kv), rel=2e-4)


def test_many_beams_against_integrated_coupled_equations(si):
    # Independent route: integrate the Darwin-Howie-Whelan equations
    # d phi_g / dz = (2 pi i / 2 K_n) [(K^2 - |k+g|^2) phi_g + sum_h V_{g-h} phi_h]
    # with V = (1 + i a) gamma F / (pi Omega) built here from the structure factors,
    # the real U_0 kept (a common phase), by an adaptive Runge-Kutta method.
    kv, a, t_nm = 200.0, 0.1, 60.0
    beams = np.array([(0, 0, 0), (1, 1, 1), (-1, -1, -1), (2, 2, 0), (-2, -2, 0),
                      (1, 1, -1), (-1, -1, 1), (0, 0, 2), (0, 0, -2), (3, 3, 1)])
    zone = (1, -1, 0)
    K = wave_number(kv)
    frame = zone_frame(si.basis, zone, (1, 1, 1))
    t_mrad = np.array([[2.0, -1.0], [-3.5, 4.0], [8.0, 1.5]])
    k = incident_wavevectors(t_mrad, frame, K)
    intensity = bloch_intensities(si, beams, k, t_nm, kv=kv, absorption_ratio=a,
                                  foil_normal=frame.beam_direction)
    gamma = relativistic_factor(kv)
    diff = beams[:, None, :] - beams[None, :, :]
    f = si.structure_factors(diff.reshape(-1, 3)).reshape(len(beams), len(beams))
    v = (1 + 1j * a) * gamma * f / (math.pi * si.volume)
    g = si.g_vectors(beams)
    for row, kk in enumerate(k):
        kn = -kk @ frame.beam_direction
        kg = kk + g
        m = v + np.diag(K * K - np.sum(kg * kg, axis=1))
        rate = 2j * math.pi / (2 * kn) * m
        phi0 = np.zeros(len(beams), complex)
        phi0[0] = 1
        sol = solve_ivp(lambda z, y: rate @ y, (0.0, t_nm * 10), phi0, method="DOP853",
                        rtol=1e-11, atol=1e-13)
        ref = np.abs(sol.y[:, -1]) ** 2
        # 1e-6: the integrator's tolerance is 1e-11 per step over ~1e3 steps
        np.testing.assert_allclose(intensity[row], ref, atol=1e-6, rtol=0)
        assert ref[1:].sum() > 0.01  # several beams carry intensity


def test_disk_solver_against_matrix_exponential(si, si230):
    # Independent numerical route for the solver of the disk calculation: the same
    # structure matrix (exact beams, Bethe potentials of the weak ones) propagated
    # by scipy.linalg.expm (Pade approximation with scaling and squaring, Al-Mohy and
    # Higham 2009) instead of the eigen-decomposition.  The points lie on the locus
    # of a strong HOLZ line, where a HOLZ branch meets the zero-layer branches and the
    # eigenvalues come closest (the hardest case for eigenvectors).
    from scipy.linalg import expm

    from laueline.dynamical import select_beams
    from laueline.dynamical.beams import _Engine

    pattern = si230
    thickness_nm = 230.0
    beams = select_beams(si, pattern.frame, pattern.beam.wave_number, pattern.disk_mrad,
                         gmax=pattern.gmax, zolz_gmax=1.5)
    engine = _Engine(si, beams, pattern.frame, pattern.beam.wave_number, pattern.beam.kv, 0.1,
                     thickness_nm * 10.0, extra_hkl=pattern.hkl)
    line = int(np.argmax(np.where(pattern.laue_zone >= 1, pattern.strength, 0.0)))
    lp = line_parameters(si.g_vectors(pattern.hkl[line:line + 1]), pattern.frame,
                         pattern.beam.wave_number)
    points = locus_samples(lp, pattern.disk_mrad * 1e-3, [-0.6, -0.1, 0.3, 0.8])[0][0] * 1e3
    group = engine.group(points, include=engine.index(pattern.hkl[line]))
    assert len(group.weak) > 0 and len(group) > 20  # Bethe terms and many beams in play
    direct = group.direct(points)
    k = incident_wavevectors(points, pattern.frame, pattern.beam.wave_number)
    kn = -k @ pattern.frame.beam_direction
    g = engine.g
    for row in range(len(points)):
        diag = -(2.0 * g[group.exact] @ k[row] + np.sum(g[group.exact] ** 2, axis=1))
        weak_s = -(2.0 * g[group.weak] @ k[row] + np.sum(g[group.weak] ** 2, axis=1))
        matrix = (group.coupling - (group.to_weak / weak_s) @ group.from_weak
                  + np.diag(diag))
        phi = expm((2j * math.pi * thickness_nm * 10.0 / (2.0 * kn[row])) * matrix)[:, 0]
        # 1e-9 of the incident intensity: both routes are exact up to rounding in a
        # matrix whose norm times the thickness is a few hundred
        assert abs(direct[row] - abs(phi[0]) ** 2) < 1e-9


def test_no_absorption_conserves_intensity(si):
    # Without absorption the structure matrix is Hermitian for a real potential and
    # the beams share the incident intensity (unitarity; Humphreys 1979)
    beams = np.array([(0, 0, 0), (1, 1, 1), (-1, -1, -1), (2, 2, 0), (-2, -2, 0), (0, 0, 4)])
    frame = zone_frame(si.basis, (1, -1, 0), (1, 1, 1))
    k = incident_wavevectors(np.array([[1.0, 2.0], [-4.0, 0.5]]), frame, wave_number(200))
    intensity = bloch_intensities(si, beams, k, 250.0, kv=200, absorption_ratio=0.0)
    np.testing.assert_allclose(intensity.sum(axis=1), 1.0, atol=1e-10)


@pytest.fixture(scope="module")
def si230(si):
    return predict(si, (2, 3, 0), 200.0, 6.0, min_strength=0.05)


def _pair(pattern, hkl):
    index = {tuple(h): i for i, h in enumerate(pattern.hkl.tolist())}
    return index[hkl], index[(hkl[0], hkl[1], -hkl[2])]


def test_kinematic_limit_puts_minima_on_the_loci(si):
    # All potentials scaled by 1e-3 (occupancies scaled): the dynamical minima must
    # lie on the exact kinematic loci of lines.py; 1e-3 mrad is the target.
    # Without absorption: a proportional absorptive potential makes even a weak
    # line's profile asymmetric, since the deficit goes as (1 + i a)^2 U_g U_-g and the
    # dispersive (odd in s) part of the second-order term enters with 2a (the
    # anomalous-absorption asymmetry of Hirsch et al. 1965, ch. 12).
    weak = dataclasses.replace(si, occupancy=si.occupancy * 1e-3)
    pattern = predict(weak, (2, 3, 0), 200.0, 6.0, min_strength=0.05)
    lines = [0, 4]
    result = dynamical_lines(pattern, 200.0, lines=lines, check_convergence=False,
                             zolz_gmax=1.2, absorption_ratio=0.0)
    for i in lines:
        assert len(result.shift_mrad[i]) >= 3
        assert np.all(np.abs(result.shift_mrad[i]) < 1e-3)
        assert np.all(result.contrast_points[i] > 0)


@pytest.mark.slow
def test_real_shifts_symmetry_and_convergence(si230):
    # The mirror z -> -z of the cubic point group maps the [2 3 0] disk onto itself
    # (t_x -> -t_x) and (h k l) onto (h k -l): at mirrored points the shifts agree to
    # the accuracy of the minimum search (1e-4 mrad).
    a, b = _pair(si230, (-7, 5, -5))
    result = dynamical_lines(si230, 200.0, lines=[a, b], check_convergence=True)
    sa, sb = result.shift_mrad[a], result.shift_mrad[b]
    assert len(sa) >= 5
    mirrored = result.locus_mrad[a] * [-1.0, 1.0]
    gap = np.linalg.norm(mirrored[:, None, :] - result.locus_mrad[b][None], axis=2)
    pa, pb = np.nonzero(gap < 1e-6)
    assert len(pa) >= 3
    np.testing.assert_allclose(sa[pa], sb[pb], atol=1e-4)
    # dynamical shifts of strong HOLZ lines in Si at 200 kV are a few 1e-2 mrad
    # (independent many-beam figures: -0.02 to +0.055 mrad)
    assert 0.003 < np.mean(np.abs(sa)) < 0.06
    # the convergence target: 2e-3 mrad when the beam set grows
    assert result.convergence_mrad is not None and result.convergence_mrad < 2e-3
    assert 0.0 < result.contrast[a] < 1.0
    assert 0.02 < result.width_mrad[a] < 0.5
    for p, n in zip(result.minima_mrad[a], result.normal_points[a]):
        assert np.hypot(*p) < si230.disk_mrad


def test_bad_input(si, si230):
    beams = [(0, 0, 0), (2, 2, 0)]
    k = np.array([[0.0, 0.0, -wave_number(200)]])
    for t in (0.0, -5.0, 2500.0, float("nan")):
        with pytest.raises(InputError, match="thickness"):
            bloch_intensities(si, beams, k, t, kv=200)
    for a in (-0.1, 1.0, 3.0):
        with pytest.raises(InputError, match="absorption_ratio"):
            bloch_intensities(si, beams, k, 100.0, kv=200, absorption_ratio=a)
    with pytest.raises(InputError, match="start with the direct beam"):
        bloch_intensities(si, beams[::-1], k, 100.0, kv=200)
    too_many = np.zeros((MAX_BEAMS + 1, 3), dtype=int)
    too_many[:, 0] = np.arange(MAX_BEAMS + 1)
    with pytest.raises(InputError, match=f"limit of {MAX_BEAMS}"):
        bloch_amplitudes(si, too_many, k, 100.0, kv=200)
    with pytest.raises(InputError, match="thickness"):
        dynamical_lines(si230, 0.0)


# -- command line ---------------------------------------------------------------

def test_cli_bad_dynamical_input_writes_nothing(capsys, tmp_path):
    from conftest import run_cli

    out = tmp_path / "p.json"
    cases = [
        ["predict", "Si", "--zone", "1", "1", "4", "--dynamical"],
        ["predict", "Si", "--zone", "1", "1", "4", "--dynamical", "--thickness-nm", "0"],
        ["predict", "Si", "--zone", "1", "1", "4", "--dynamical", "--thickness-nm", "2500"],
        ["predict", "Si", "--zone", "1", "1", "4", "--dynamical", "--thickness-nm", "100",
         "--absorption-ratio", "1"],
        ["predict", "Si", "--zone", "1", "1", "4", "--thickness-nm", "100"],
        ["predict", "Si", "--zone", "1", "1", "4", "--dynamical", "--thickness-nm",
         str(tmp_path / "missing.json")],
    ]
    for argv in cases:
        code, _, err = run_cli(capsys, *argv, "--json", out)
        assert code == 2, argv
        assert err.startswith("laueline: error:") and err.count("\n") == 1, err
        assert "Traceback" not in err and not out.exists()
    image = tmp_path / "d.png"
    code, _, err = run_cli(capsys, "render", "Si", "--zone", "1", "1", "4", "--dynamical",
                           "--out", image)
    assert code == 2 and "--thickness-nm" in err and not image.exists()
    points = tmp_path / "points.csv"
    points.write_text("x,y\n10,20\n30,40\n50,10\n")
    code, _, err = run_cli(capsys, "refine", "Si", "--zone", "1", "1", "4", "--dynamical",
                           "--thickness-nm", "-3", "--points", points)
    assert code == 2 and "thickness" in err


def test_pattern_document_version_2(si):
    from laueline.report import pattern_document

    pattern = predict(si, (2, 3, 0), 200.0, 1.5, min_strength=0.3)
    dyn = dynamical_lines(pattern, 150.0, lines=[0], check_convergence=False, zolz_gmax=1.2)
    doc = json.loads(json.dumps(pattern_document(pattern, dyn)))
    assert doc["schema"] == "laueline.pattern/2"
    top = doc["dynamical"]
    assert top["thickness_nm"] == 150 and top["absorption_ratio"] == 0.1
    assert top["n_beams"] > 10 and top["convergence_mrad"] is None
    first = doc["lines"][0]["dynamical"]
    assert set(first) >= {"minima_mrad", "contrast", "width_mrad"}
    assert len(first["minima_mrad"]) >= 5
    for x, y in first["minima_mrad"]:
        assert math.hypot(x, y) <= 1.5
    assert doc["lines"][1]["dynamical"]["minima_mrad"] == []  # not computed
    # without the dynamical lines the document stays version 1
    doc1 = pattern_document(pattern)
    assert doc1["schema"] == "laueline.pattern/1"
    assert all("dynamical" not in ln for ln in doc1["lines"]) and "dynamical" not in doc1


# -- corrected fits -------------------------------------------------------------

@pytest.mark.slow
def test_corrected_fit_in_the_kinematic_limit_matches_the_kinematic_fit(si):
    # With every potential scaled by 1e-3 and no absorption the dynamical shifts
    # vanish (kinematic limit, see above), so the corrected strain must equal the
    # kinematic one and the systematic part must vanish, both to 5 % of the fit's
    # statistical sigma (the residual shifts are below 1e-3 mrad).
    from conftest import DETECTOR, synthetic_points

    from laueline.dynamical import refine_dynamical

    weak = dataclasses.replace(si, occupancy=si.occupancy * 1e-3)
    strain = [8e-4, -4e-4, 3e-4, 0.0, 1e-4, 2e-4]
    points = synthetic_points(weak, (1, 1, 4), n=10, strain=strain, x_axis=None,
                              rng=np.random.default_rng(3), noise_px=0.05, disk_mrad=3.0)
    fit = refine_dynamical(weak, (1, 1, 4), points, thickness_nm=150.0,
                           absorption_ratio=0.0, zolz_gmax=1.0, disk_mrad=3.0,
                           calibration=(200.0, DETECTOR))
    assert fit.settled and fit.rounds == 1
    sigma = np.sqrt(np.diag(fit.covariance_voigt_statistical))
    assert np.all(np.abs(fit.strain_voigt - fit.strain_voigt_kinematic) < 0.05 * sigma)
    assert np.all(np.sqrt(np.diag(fit.covariance_voigt_systematic)) < 0.05 * sigma)
    np.testing.assert_allclose(fit.covariance_voigt,
                               fit.covariance_voigt_statistical
                               + fit.covariance_voigt_systematic)


def test_kinematic_bias_floor(si):
    # When the engine would take too long the documented floor is returned:
    # 2e-4 per component with a calibration held (independent many-beam figures,
    # 1.5e-4 to 1.9e-4, rounded up), 1e-3 without.
    from conftest import DETECTOR, synthetic_points

    from laueline.dynamical import KINEMATIC_BIAS_FLOOR, kinematic_bias
    from laueline.refine import refine

    points = synthetic_points(si, (2, 3, 0), n=12, x_axis=None)
    fit = refine(si, (2, 3, 0), points, calibration=(200.0, DETECTOR))
    bias = kinematic_bias(fit, si, points, max_seconds=0.0)
    assert bias.method == "floor" and KINEMATIC_BIAS_FLOOR["calibrated"] == 2e-4
    np.testing.assert_allclose(bias.sigma_voigt, 2e-4)
    np.testing.assert_allclose(np.diag(bias.covariance_voigt), 4e-8)
