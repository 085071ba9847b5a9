"""Thin lamellae: kinematic line profiles, their measurement and the relaxation fit.

Independent routes: closed forms (sinc^2 of a perfect foil, Hirsch et al.
1977), scipy.integrate.quad and dense trapezoidal quadrature of the profile
integral written out here, the excitation error from wave vectors
(K^2 - |K_in + g|^2) / 2K, and images drawn by a renderer in this file.
"""

import json
import math

import numpy as np
import pytest
from scipy.integrate import cumulative_trapezoid, quad
from scipy.ndimage import gaussian_filter

from laueline import predict, read_crystal
from laueline.detector import Detector
from laueline.errors import InputError
from laueline.frame import incident_wavevectors
from laueline.lines import line_parameters
from laueline.relaxation import (ProfileData, assess_line_profiles, excitation_errors,
                                 fit_profiles, kinematic_profile, read_displacement_table,
                                 relaxation, relaxation_displacement, strain_shifts)

from conftest import run_cli

ZONE = (2, 3, 0)


def quadrature_profile(s, g_dot_u, t_A, n=4001):
    """|integral_0^t exp(2 pi i (s z + g.u(z))) dz|^2 / t^2 by the trapezoidal rule.

    ``g_dot_u`` is a function of depth in angstrom; n points resolve the
    phase far better than the slab model's 256 slabs.
    """
    z = np.linspace(0.0, t_A, n)
    phase = 2 * np.pi * (np.asarray(s)[:, None] * z + g_dot_u(z)[None, :])
    re = np.trapezoid(np.cos(phase), z, axis=1)
    im = np.trapezoid(np.sin(phase), z, axis=1)
    return (re ** 2 + im ** 2) / t_A ** 2


def cosh_phase(ga_cycles, length_A, t_A):
    """g.w(z) of a surface displacement decaying as cosh from the mid-plane (written out here)."""
    return lambda z: ga_cycles * (np.cosh((z - t_A / 2) / length_A) - 1) / (
        np.cosh(t_A / (2 * length_A)) - 1)


# ---------------------------------------------------------------------------
# the profile integral
# ---------------------------------------------------------------------------

def test_uniform_strain_is_sinc_squared():
    # Hirsch et al. (1977), kinematic rocking curve of a perfect foil:
    # I(s) / I(0) = sin^2(pi t s) / (pi t s)^2
    t_nm = 150.0
    t_A = 10 * t_nm
    s = np.linspace(-3.0, 3.0, 601)[None, :] / t_A
    profile = kinematic_profile(s, np.zeros((1, 257)), t_nm)[0]
    expected = np.sinc(s[0] * t_A) ** 2
    # the slab integral of a linear phase is exact: only rounding remains
    np.testing.assert_allclose(profile, expected, atol=1e-12)
    assert s[0, np.argmax(profile)] == 0.0
    # full width at half maximum 0.8859 / t (property of sinc^2, from memory)
    half = s[0][profile >= 0.5]
    assert half[-1] - half[0] == pytest.approx(0.8859 / t_A, abs=2 * (s[0, 1] - s[0, 0]))


def test_excitation_error_across_a_line(si):
    pattern = predict(si, ZONE, 200, 6)
    lp = line_parameters(si.g_vectors(pattern.hkl), pattern.frame, pattern.beam.wave_number)
    # on the exact loci s vanishes (the locus equation 2 K_in.g + |g|^2 = 0)
    s_locus = excitation_errors(pattern.points_mrad, lp)
    assert np.max(np.abs(s_locus)) < 1e-12
    # off the loci: against s = (K^2 - |K_in + g|^2) / (2K) from wave vectors
    # (the kinematic definition; Hirsch et al. 1977)
    rng = np.random.default_rng(3)
    t = pattern.points_mrad[:, 10] + rng.normal(0, 0.3, (pattern.n_lines, 2))
    k = pattern.beam.wave_number
    k_in = incident_wavevectors(t, pattern.frame, k)
    g = si.g_vectors(pattern.hkl)
    expected = (k * k - np.sum((k_in + g) ** 2, axis=1)) / (2 * k)
    got = excitation_errors(t[:, None, :], lp)[:, 0]
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-15)


def test_linear_strain_gradient_against_quad():
    # a strain growing linearly with depth shifts the local excitation error
    # by beta z: g.u = beta z^2 / 2.  Reference: scipy.integrate.quad on the
    # real and imaginary parts of the profile integral.
    t_nm = 200.0
    t_A = 10 * t_nm
    beta = 3.0 / t_A ** 2                     # three cycles of extra phase over the foil
    edges = np.linspace(0.0, t_A, 257)
    s = np.linspace(-4.0, 2.0, 13) / t_A
    got = kinematic_profile(s[None, :], (0.5 * beta * edges ** 2)[None, :], t_nm)[0]
    expected = []
    for sv in s:
        def phase(z):
            return 2 * np.pi * (sv * z + 0.5 * beta * z * z)

        re = quad(lambda z: math.cos(phase(z)), 0, t_A, limit=200)[0]
        im = quad(lambda z: math.sin(phase(z)), 0, t_A, limit=200)[0]
        expected.append((re * re + im * im) / t_A ** 2)
    # the slab model's error is about pi^2 (s dz)(gamma dz) / 3 < 1e-3 here
    np.testing.assert_allclose(got, expected, atol=1e-3)
    assert np.ptp(expected) > 0.2              # a profile with structure, not a flat line


def test_symmetric_relaxation_gives_symmetric_split_profile():
    # a displacement symmetric about the mid-plane makes the profile symmetric
    # about the mid-foil locus: substitute x -> -x in the integral (Hirsch et al.)
    t_nm, length_nm = 300.0, 60.0
    g = np.array([[1.9, 0.6, 0.05]])          # 1/A, disk frame
    z = np.linspace(0.0, t_nm, 257)
    u = relaxation_displacement("cosh", (0.1, -0.02, length_nm), z, t_nm)
    gu = 10 * g @ u.T
    shift = 2.0e-4                            # the mid-foil strain moves the line ...
    centre = -shift                           # ... to where s + shift = 0
    d = np.linspace(0.0, 5.0, 201) / (10 * t_nm)
    right = kinematic_profile((centre + d + shift)[None, :], gu, t_nm)[0]
    left = kinematic_profile((centre - d + shift)[None, :], gu, t_nm)[0]
    np.testing.assert_allclose(right, left, atol=1e-12)   # exact symmetry up to rounding
    # ... and split: its two highest maxima lie either side of the mid-foil locus,
    # which the relaxed surface layers leave lower
    both = np.concatenate([left[::-1], right[1:]])
    peaks = np.flatnonzero((both[1:-1] > both[:-2]) & (both[1:-1] >= both[2:])) + 1
    top = np.sort(peaks[np.argsort(both[peaks])[-2:]])
    assert top[0] < 200 < top[1] and both[200] < 0.85 * both[top].min()
    # and the same profile by dense trapezoidal quadrature of the written-out field
    ga = 10 * float(g[0, :2] @ [0.1, -0.02])
    ref = quadrature_profile(centre + d + shift, cosh_phase(ga, 10 * length_nm, 10 * t_nm),
                             10 * t_nm)
    np.testing.assert_allclose(right, ref, atol=2e-3)   # slab error < 1e-3, see above


def test_fit_engine_matches_profile_integral():
    # the fit evaluates profiles on fixed grids with a precomputed phase table;
    # it must agree with the direct slab sum (itself checked against quad above)
    from laueline.relaxation.profile import _ProfileEngine

    t_nm = 250.0
    z = np.linspace(0.0, t_nm, 257)
    u = relaxation_displacement("cosh", (0.05, 0.02, 40.0), z, t_nm)
    g = np.array([[1.8, -0.7, 0.05], [0.4, 2.1, 0.1]])
    gu = 10 * g @ u.T
    d = np.linspace(-12, 12, 97)
    slope = np.array([-5e-5, 4e-5])            # 1/A per px
    s0 = np.array([1e-4, -2e-4])
    engine = _ProfileEngine(slope, d, t_nm, 256)
    direct = kinematic_profile(s0[:, None] + slope[:, None] * d, gu, t_nm)
    np.testing.assert_allclose(engine(s0, gu), direct, atol=1e-12)   # same sum, reordered


# the Bloch-wave engine takes 20-40 s for two lines at one thickness on a loaded
# machine: run with the slow workflows
@pytest.mark.slow
def test_uniform_profile_against_bloch_wave_engine(si):
    # An independent route: the Bloch-wave engine (many beams, absorption
    # 0.1) gives each line's deficit minimum and its full width at half
    # depth.  For a uniformly strained foil the kinematic profile has its
    # minimum on the exact locus and a FWHM of 0.886 / t in s, i.e.
    # 0.886 / (t |g_perp|) rad across the line.  Si [2 3 0], 200 kV, 300 nm.
    from laueline.dynamical import dynamical_lines

    t_nm = 300.0
    pattern = predict(si, ZONE, 200, 6, min_strength=0.3)
    wanted = [(-7, 5, -5), (5, -3, -9)]        # the two strongest lines, one per mirror pair
    idx = [int(np.flatnonzero((pattern.hkl == h).all(axis=1))[0]) for h in wanted]
    g_perp = np.linalg.norm(pattern.frame.components(si.g_vectors(pattern.hkl[idx]))[:, :2],
                            axis=1)
    s = np.linspace(-3, 3, 6001) / (10 * t_nm)
    profile = kinematic_profile(s[None, :], np.zeros((1, 257)), t_nm)[0]
    half = s[profile >= 0.5]
    kin_width = (half[-1] - half[0]) / g_perp * 1e3                 # mrad
    assert s[np.argmax(profile)] == 0.0                             # on the exact locus
    dyn = dynamical_lines(pattern, t_nm, lines=idx, check_convergence=False)
    shift = dyn.mean_shift_mrad[idx]
    width = dyn.width_mrad[idx]
    # measured (README, "Thin lamellae"): widths 0.156 and 0.148 mrad against
    # kinematic 0.161 and 0.149 (1-3 % narrower); minima 0.002 and 0.008 mrad off
    # the locus, under 6 % of the width.  Bounds: widths within 5 %, shifts under
    # 10 % of the kinematic width - the statement the README makes
    np.testing.assert_allclose(width, kin_width, rtol=0.05)
    assert np.all(np.abs(shift) < 0.1 * kin_width), (shift, kin_width)
    assert np.all(width < kin_width)           # narrower in every case measured (README)


# ---------------------------------------------------------------------------
# displacement tables
# ---------------------------------------------------------------------------

def test_displacement_table_matches_cosh(tmp_path):
    t_nm, length = 250.0, 30.0
    z = np.linspace(0, t_nm, 301)
    w = (np.cosh((z - t_nm / 2) / length) - 1) / (np.cosh(t_nm / 2 / length) - 1)
    path = tmp_path / "fe.csv"
    rows = ["# finite-element export", "z_nm,ux_nm,uy_nm"]
    # a uniform strain (linear term) and an offset in the table belong to the mid-foil
    # strain and are removed
    rows += [f"{a},{0.05 * b + 1e-4 * a + 0.3},{-0.01 * b}" for a, b in zip(z, w)]
    path.write_text("\n".join(rows))
    table = read_displacement_table(path, t_nm)
    zz = np.linspace(0, t_nm, 97)
    got = relaxation_displacement("table", (1.0,), zz, t_nm, table)
    want = relaxation_displacement("cosh", (0.05, -0.01, length), zz, t_nm)
    # linear interpolation of a 301-point table: error ~ h^2 w'' / 8 ~ 1e-5 nm
    np.testing.assert_allclose(got, want, atol=2e-5)


@pytest.mark.parametrize("rows, message", [
    (["z_nm,ux_nm", "0,0", "100,1", "50,0", "200,0"], "not strictly monotonic"),
    (["z_nm,ux_nm", "-20,0", "100,1", "200,0"], "outside the foil"),
    (["z_nm,ux_nm", "0,0", "100,1", "260,0"], "outside the foil"),
    (["z_nm,ux_nm,exz", "0,0,0", "100,1,0", "200,0,0"], "not both"),
    (["depth,ux_nm", "0,0", "200,0", "100,0"], "no z_nm column"),
    (["z_nm,ux_nm", "0,0", "100,abc", "200,0"], "a number"),
])
def test_bad_tables(tmp_path, rows, message):
    path = tmp_path / "t.csv"
    path.write_text("\n".join(rows))
    with pytest.raises(InputError, match=message):
        read_displacement_table(path, 200.0)


def test_thickness_is_required(tmp_path):
    path = tmp_path / "t.csv"
    path.write_text("z_nm,ux_nm\n0,0\n200,0\n")
    with pytest.raises(InputError, match="thickness"):
        read_displacement_table(path, None)


# ---------------------------------------------------------------------------
# recovery from profiles made by quadrature
# ---------------------------------------------------------------------------

def _synthetic_profiles(si, n_lines, truth, t_nm, blur_px, scale_px_per_mrad=36.0,
                        half_width_px=20.0, step_px=0.5, strain_profile=None):
    """Noise-free profiles of the strongest lines by dense quadrature and explicit blur.

    With ``strain_profile`` (a function of depth in nm giving e(z) / e_mid) the
    strain itself varies through the foil instead of the cosh displacement.
    """
    pattern = predict(si, ZONE, 200, 6, min_strength=0.3)
    idx = np.argsort(-pattern.strength, kind="stable")[:n_lines]
    hkl = pattern.hkl[idx]
    k = pattern.beam.wave_number
    lp = line_parameters(si.g_vectors(hkl), pattern.frame, k)
    t_mid = pattern.points_mrad[idx, 32]
    shifts = strain_shifts(si.basis, ZONE, pattern.x_axis, k, hkl, t_mid)
    slope = -lp.g_perp_norm * 1e-3 / scale_px_per_mrad    # s per px across the line
    d = np.arange(-half_width_px, half_width_px + step_px / 2, step_px)
    fine = np.arange(-half_width_px - 8, half_width_px + 8 + 1e-9, 0.05)
    kernel = np.exp(-0.5 * (np.arange(-8, 8 + 1e-9, 0.05) / blur_px) ** 2)
    kernel /= kernel.sum()
    t_A = 10 * t_nm
    profiles = []
    for p in range(n_lines):
        shift = float(shifts[p] @ truth["strain"])
        if strain_profile is None:
            ga = 10 * float(lp.g_perp[p] @ truth["u"])
            s = slope[p] * fine + shift
            phase = cosh_phase(ga, 10 * truth["length"], t_A)
        else:   # local excitation error s + shift f(z): phase shift * integral_0^z (f - 1)
            s = slope[p] * fine + shift
            zz = np.linspace(0.0, t_A, 3001)
            extra = cumulative_trapezoid(strain_profile(zz / 10) - 1, zz, initial=0.0)

            def phase(z, extra=extra, zz=zz, shift=shift):
                return shift * np.interp(z, zz, extra)
        sharp = quadrature_profile(s, phase, t_A, n=1501)
        blurred = np.convolve(sharp, kernel, mode="same")
        profiles.append(np.interp(d, fine, blurred))
    data = ProfileData(d, np.zeros((n_lines, len(d))), np.ones((n_lines, len(d))),
                       np.stack([np.zeros(n_lines), slope], 1), shifts,
                       np.zeros((n_lines, 3)),
                       np.concatenate([lp.g_perp, lp.gz[:, None]], axis=1))
    return data, np.array(profiles)


def test_relaxation_recovered_with_honest_sigmas(si):
    truth = {"strain": np.array([1.2e-3, -0.6e-3, 0.8e-3, 0.2e-3, -0.3e-3, 0.4e-3]),
             "u": np.array([0.045, 0.015]), "length": 45.0}
    t_nm, blur, noise = 300.0, 1.2, 0.004
    data, clean = _synthetic_profiles(si, 10, truth, t_nm, blur)
    rng = np.random.default_rng(11)
    true = np.concatenate([truth["strain"], truth["u"], [truth["length"], blur]])
    names = ["exx", "eyy", "ezz", "eyz", "exz", "exy", "ux_nm", "uy_nm", "decay_length_nm",
             "instrument_sigma_px"]
    z = []
    for _ in range(3):
        y = 1.0 - 0.6 * clean + rng.normal(0, noise, clean.shape)
        data.intensity = y
        data.sigma = np.full_like(y, noise)
        fit = fit_profiles(data, t_nm, "cosh", hold=("center_x", "center_y", "rotation"))
        assert fit.success
        est = np.array([fit.value(n)[0] for n in names])
        sig = np.array([fit.value(n)[1] for n in names])
        z.append((est - true) / sig)
        assert fit.chi2 / fit.dof < 1.3      # the model describes quadrature profiles
    z = np.array(z)
    # Monte Carlo coverage: normalised errors should scatter with unit variance.
    # 30 values: mean z^2 lies in [0.5, 1.7] with ~98 % probability for a chi-square
    # with 30 dof (wider than that because values within one trial are correlated)
    assert 0.3 < np.mean(z ** 2) < 2.5, z
    assert np.max(np.abs(z)) < 4.5, z


def test_relaxed_strain_recovered(si):
    # the strain itself relaxing towards both surfaces, written out here:
    # e(z) / e_mid = 1 - r (cosh((z - t/2)/L) - 1) / (cosh(t/2L) - 1)
    t_nm, r, length, noise = 300.0, 0.8, 50.0, 0.004
    truth = {"strain": np.array([2.5e-3, -1.2e-3, 1.8e-3, 0.4e-3, -0.6e-3, 0.8e-3])}

    def ratio(z):
        return 1 - r * (np.cosh((z - t_nm / 2) / length) - 1) / (np.cosh(t_nm / 2 / length) - 1)

    data, clean = _synthetic_profiles(si, 12, truth, t_nm, 1.0, strain_profile=ratio)
    data.intensity = 1.0 - 0.6 * clean + np.random.default_rng(4).normal(0, noise, clean.shape)
    data.sigma = np.full_like(clean, noise)
    fit = fit_profiles(data, t_nm, "relaxed-strain", hold=("center_x", "center_y", "rotation"))
    assert fit.success
    # within 3 sigma: one realisation, false alarms ~0.3 % per number
    for name, want in (("relaxed_fraction", r), ("decay_length_nm", length),
                       *zip(("exx", "eyy", "ezz", "eyz", "exz", "exy"), truth["strain"])):
        value, sigma = fit.value(name)
        assert abs(value - want) < 3 * sigma, (name, value, sigma, want)


# ---------------------------------------------------------------------------
# end to end: an image with split lines, drawn here
# ---------------------------------------------------------------------------

def _render_split(si, strain, u_nm, length_nm, t_nm, detector, size=512, blur_px=1.0,
                  dose=6000.0, seed=5, depth=0.8, disk_mrad=6.0):
    """A central disk whose lines have quadrature profiles around their exact loci.

    The excitation error of every pixel is computed from wave vectors,
    s = (K^2 - |K_in + g|^2) / 2K, for the crystal strained by ``strain``
    (the mid-foil lattice); the relaxation enters as the phase g.w(z).
    """
    strained = si.strained(np.array([[strain[0], strain[5], strain[4]],
                                     [strain[5], strain[1], strain[3]],
                                     [strain[4], strain[3], strain[2]]]))
    pattern = predict(strained, ZONE, 200, disk_mrad, min_strength=0.15)
    k = pattern.beam.wave_number
    y, x = np.mgrid[0:size, 0:size].astype(float)
    radius_px = disk_mrad * detector.scale_px_per_mrad
    r = np.hypot(x - detector.center_px[0], y - detector.center_px[1])
    inside = r < radius_px
    t = detector.to_mrad(np.stack([x[inside], y[inside]], 1))
    k_in = incident_wavevectors(t, pattern.frame, k)
    g_cart = strained.g_vectors(pattern.hkl)
    g_frame = pattern.frame.components(g_cart)
    t_A = 10 * t_nm
    s_grid = np.linspace(-8.0, 8.0, 641) / t_A
    factor = np.ones(len(t))
    for i in range(pattern.n_lines):
        s = (k * k - np.sum((k_in + g_cart[i]) ** 2, axis=1)) / (2 * k)
        near = np.abs(s) < s_grid[-1]
        ga = 10 * float(g_frame[i, :2] @ u_nm)
        table = quadrature_profile(s_grid, cosh_phase(ga, 10 * length_nm, t_A), t_A, n=1201)
        factor[near] *= 1 - depth * pattern.strength[i] * np.interp(s[near], s_grid, table)
    image = np.full((size, size), 0.05)
    image[inside] = factor
    image = gaussian_filter(image, blur_px)
    return np.random.default_rng(seed).poisson(image * dose).astype(float)


@pytest.fixture(scope="module")
def split_image():
    si = read_crystal("Si")
    detector = Detector((257.4, 253.8), 0.42 * 512 / 6, 12.0, False)
    truth = {"strain": np.array([1.5e-3, -0.5e-3, 1.0e-3, 0.0, 0.0, 0.3e-3]),
             "u": np.array([0.04, 0.012]), "length": 100.0, "t": 400.0}
    image = _render_split(si, truth["strain"], truth["u"], truth["length"], truth["t"],
                          detector)
    return image, detector, truth


# the whole pipeline (detection, single-strain fit, two profile passes, figure) takes
# 10-20 s on one core: run with the slow workflows
@pytest.mark.slow
def test_split_lines_detected_and_mid_foil_strain_recovered(tmp_path, capsys, split_image):
    image, detector, truth = split_image
    np.save(tmp_path / "p.npy", image)
    cal = tmp_path / "cal.json"
    cal.write_text(json.dumps({"schema": "laueline.fit/1", "kv": 200.0,
                               "detector": detector.as_dict()}))
    out = tmp_path / "r.json"
    code, stdout, err = run_cli(capsys, "relaxation", "Si", "--zone", *ZONE, "--image",
                                tmp_path / "p.npy", "--calibration", cal, "--thickness-nm",
                                truth["t"], "--json", out, "--figure", tmp_path / "r.png")
    assert code == 0, err
    assert "kinematic" in stdout and (tmp_path / "r.png").stat().st_size > 0
    doc = json.loads(out.read_text())
    assert doc["schema"] == "laueline.relaxation/1" and doc["success"]
    for key in ("model", "parameters", "strain_mid", "lines", "chi2", "dof", "message"):
        assert key in doc
    assert doc["lines"][0]["measured"] and doc["lines"][0]["fitted"]
    # lines not normal to the surface displacement are visibly split
    assert sum(line["split"] for line in doc["lines"]) >= 2
    # recovered within 3 sigma (a single realisation; 3 sigma keeps false alarms ~0.3 %)
    strain = np.array(doc["strain_mid"]["values"])
    sigma = np.array(doc["strain_mid"]["sigmas"])
    assert np.all(np.abs(strain - truth["strain"]) < 3 * sigma), (strain, sigma)
    got = dict(zip(doc["parameters"]["names"],
                   zip(doc["parameters"]["values"], doc["parameters"]["sigmas"])))
    for name, want in (("ux_nm", truth["u"][0]), ("uy_nm", truth["u"][1]),
                       ("decay_length_nm", truth["length"])):
        assert abs(got[name][0] - want) < 3 * got[name][1], (name, got[name], want)
    # the single-strain route is told that its lines are split or broadened
    from laueline.images.detect import detect_lines
    from laueline.relaxation import line_shape_warning

    assessed = assess_line_profiles(image, detect_lines(image))
    assert sum(a.split or a.broadened for a in assessed) >= 2
    assert "laueline relaxation" in line_shape_warning(assessed)


# ---------------------------------------------------------------------------
# bad input through the command line: one line, exit status 2
# ---------------------------------------------------------------------------

def _cli_files(tmp_path, image):
    np.save(tmp_path / "p.npy", image)
    cal = tmp_path / "cal.json"
    cal.write_text(json.dumps({"schema": "laueline.fit/1", "kv": 200.0,
                               "detector": Detector((64.0, 64.0), 9.0).as_dict()}))
    return tmp_path / "p.npy", cal


def test_cli_bad_input(tmp_path, capsys):
    y, x = np.mgrid[0:128, 0:128]
    blank = np.where(np.hypot(x - 64, y - 64) < 54, 1000.0, 50.0)  # a disk without lines
    image, cal = _cli_files(tmp_path, blank)
    table = tmp_path / "t.csv"
    table.write_text("z_nm,ux_nm\n0,0\n150,1\n100,0\n200,0\n")
    base = ["relaxation", "Si", "--zone", *ZONE, "--image", image, "--calibration", cal]
    cases = [
        base,                                                        # thickness missing
        base + ["--thickness-nm", 200, "--displacement-table", table],  # non-monotonic
        base + ["--thickness-nm", 200],                              # no lines to profile
        base + ["--thickness-nm", -5],
    ]
    for argv in cases:
        code, out, err = run_cli(capsys, *argv)
        assert code == 2, (argv, err)
        assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert not (tmp_path / "r.json").exists()
