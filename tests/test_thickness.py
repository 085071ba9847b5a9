"""Two-beam thickness against the dynamical rocking curve and handbook tables."""

import json

import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from laueline.crystal import read_crystal
from laueline.errors import InputError
from laueline.optics import wavelength_A
from laueline.thickness import (detect_profile, kinematic_extinction_distance_nm,
                                thickness_from_fringes, two_beam_intensity)

KV = 200.0
D_SI220 = read_crystal("Si").d_spacing([[2, 2, 0]])[0]
SEPARATION_PX = 400.0


def px_per_inv_nm(d_A=D_SI220, separation=SEPARATION_PX, kv=KV):
    """x = s d^2 L / lambda: the pixels per 1/nm of deviation parameter."""
    return (d_A / 10) ** 2 * separation / (wavelength_A(kv) / 10)


def rocking_curve_minima(t, xi, count):
    """Dark fringes located numerically on the two-beam curve of Hirsch et al. (1965)."""
    first = int(np.floor(t / xi)) + 1
    minima = []
    for n in range(first, first + count):
        guess = np.sqrt(max(n * n / t ** 2 - 1 / xi ** 2, 0.0))
        lo = np.sqrt(max((n - 0.5) ** 2 / t ** 2 - 1 / xi ** 2, 0.0))
        hi = np.sqrt((n + 0.5) ** 2 / t ** 2 - 1 / xi ** 2)
        res = minimize_scalar(lambda s: two_beam_intensity(s, t, xi), bounds=(lo, hi),
                              method="bounded", options={"xatol": 1e-12})
        assert abs(res.x - guess) < 1e-6
        minima.append(res.x)
    return np.array(minima), first


@pytest.mark.parametrize("t, xi", [(40.0, 76.0), (90.0, 76.0), (180.0, 76.0),
                                   (300.0, 76.0), (420.0, 60.0)])
def test_thickness_and_numbering_from_rocking_curve(t, xi):
    # thin (t < xi) to thick (several xi) foils
    s, first = rocking_curve_minima(t, xi, 5)
    x = s * px_per_inv_nm()
    r = thickness_from_fringes(x, SEPARATION_PX, kv=KV, d_spacing_A=D_SI220)
    assert r.first_fringe_index == first
    # the issue asks for 1 %; numerical minima on the exact curve give better
    assert r.thickness_nm == pytest.approx(t, rel=1e-3)
    assert r.extinction_distance_nm == pytest.approx(xi, rel=1e-3)
    assert any(c.first_fringe_index == first for c in r.candidates)


def test_noisy_positions_within_uncertainty():
    rng = np.random.default_rng(4)
    s, _ = rocking_curve_minima(180.0, 76.0, 6)
    x0 = s * px_per_inv_nm()
    estimates, sigmas, within = [], [], 0
    for _ in range(200):
        x = x0 + rng.normal(0, 0.3, x0.shape)
        r = thickness_from_fringes(x, SEPARATION_PX, kv=KV, d_spacing_A=D_SI220,
                                   fringes_sigma=0.3)
        if r.first_fringe_index != 3:
            continue
        estimates.append(r.thickness_nm)
        sigmas.append(r.thickness_sigma_nm)
        within += abs(r.thickness_nm - 180.0) < 2 * r.thickness_sigma_nm
    assert len(estimates) > 190
    # 2-sigma coverage of a Gaussian is 95 %; allow sampling slack
    assert within / len(estimates) > 0.88
    # the propagated sigma matches the scatter (200 samples: ~5 % on a std)
    assert np.mean(sigmas) == pytest.approx(np.std(estimates), rel=0.25)


@pytest.mark.parametrize("name, hkl, table_nm", [
    ("Si", (2, 2, 0), 75.7), ("Si", (1, 1, 1), 60.2), ("Al", (1, 1, 1), 55.6),
    ("Al", (2, 0, 0), 67.3), ("Cu", (1, 1, 1), 28.6), ("alpha-Fe", (1, 1, 0), 27.0),
])
def test_kinematic_extinction_distance_against_table(name, hkl, table_nm):
    # Two-beam extinction distances at 100 kV, static lattice, as tabulated by
    # Hirsch et al. (1965, appendix) and reproduced in Williams and Carter
    # (2009, Table 13.1); values from memory.  The tables were computed with
    # other scattering factors: the issue allows 10 %.
    crystal = read_crystal(name).with_b_iso(0.0)
    assert kinematic_extinction_distance_nm(crystal, hkl, 100.0) == \
        pytest.approx(table_nm, rel=0.10)


def test_two_fringes_ambiguity_reported():
    s, _ = rocking_curve_minima(150.0, 76.0, 2)
    r = thickness_from_fringes(s * px_per_inv_nm(), SEPARATION_PX, kv=KV,
                               d_spacing_A=D_SI220)
    assert any("two fringes" in w for w in r.warnings)


def test_kinematic_comparison_flags_wrong_reflection():
    si = read_crystal("Si")
    s, _ = rocking_curve_minima(180.0, 40.0, 5)   # xi far from Si 220's ~100 nm at 200 kV
    r = thickness_from_fringes(s * px_per_inv_nm(), SEPARATION_PX, kv=KV, crystal=si,
                               hkl=(2, 2, 0))
    assert r.kinematic_extinction_distance_nm == pytest.approx(
        kinematic_extinction_distance_nm(si, (2, 2, 0), KV))
    assert any("30 %" in w for w in r.warnings)


def synthetic_profile(t, xi, rng, samples=4000, dose=2000.0, width_px=380.0):
    """Direct then diffracted disk along +g, two-beam intensities, Poisson noise."""
    pos = np.linspace(0, 1000, samples)
    c0, c1 = 250.0, 250.0 + SEPARATION_PX
    scale = px_per_inv_nm()
    inten = np.full_like(pos, 0.03)
    for centre, diffracted in [(c0, False), (c1, True)]:
        u = pos - centre
        inside = np.abs(u) <= width_px / 2
        ig = two_beam_intensity(u / scale, t, xi)
        inten[inside] = 0.15 + 0.85 * (ig[inside] if diffracted else 1 - ig[inside])
    return pos, rng.poisson(inten * dose) / dose


def test_profile_detection_and_thickness():
    rng = np.random.default_rng(8)
    pos, inten = synthetic_profile(180.0, 76.0, rng)
    det = detect_profile(pos, inten)
    # disk edges, sub-sample
    assert det.disk_centres == pytest.approx([250.0, 650.0], abs=1.0)
    assert det.separation == pytest.approx(SEPARATION_PX, abs=1.0)
    s, first = rocking_curve_minima(180.0, 76.0, len(det.fringes))
    np.testing.assert_allclose(det.fringes, s * px_per_inv_nm(), atol=1.5)
    r = thickness_from_fringes(det.fringes, det.separation, kv=KV, d_spacing_A=D_SI220,
                               fringes_sigma=det.fringes_sigma,
                               separation_sigma=det.separation_sigma)
    assert r.first_fringe_index == first
    assert abs(r.thickness_nm - 180.0) < max(3 * r.thickness_sigma_nm, 0.02 * 180)


def test_profile_without_two_disks():
    pos = np.linspace(0, 100, 500)
    with pytest.raises(InputError, match="two disks"):
        detect_profile(pos, np.exp(-((pos - 50) / 10) ** 2))


@pytest.mark.parametrize("fringes, separation, message", [
    ([10.0], 400.0, "two fringes"),
    ([20.0, 10.0, 30.0], 400.0, "increase"),
    ([10.0, 20.0], 0.0, "positive"),
    ([10.0, 20.0], -5.0, "positive"),
    ([-1.0, 20.0], 400.0, "positive"),
])
def test_bad_fringes(fringes, separation, message):
    with pytest.raises(InputError, match=message):
        thickness_from_fringes(fringes, separation, d_spacing_A=1.92)


def test_cli_thickness(tmp_path, capsys):
    from laueline.cli import main

    s, _ = rocking_curve_minima(180.0, 76.0, 5)
    out = tmp_path / "t.json"
    fig = tmp_path / "t.png"
    code = main(["thickness", "Si", "--hkl", "2", "2", "0", "--separation-px",
                 str(SEPARATION_PX), "--fringes-px", *[f"{v:.4f}" for v in s * px_per_inv_nm()],
                 "--json", str(out), "--figure", str(fig)])
    assert code == 0
    doc = json.loads(out.read_text())
    assert doc["schema"] == "laueline.thickness/1"
    for key in ["thickness_nm", "thickness_sigma_nm", "extinction_distance_nm",
                "extinction_distance_sigma_nm", "first_fringe_index",
                "kinematic_extinction_distance_nm", "candidates", "warnings"]:
        assert key in doc
    assert doc["thickness_nm"] == pytest.approx(180.0, rel=1e-3)
    # profile input
    pos, inten = synthetic_profile(180.0, 76.0, np.random.default_rng(1))
    prof = tmp_path / "profile.csv"
    np.savetxt(prof, np.stack([pos, inten], 1), delimiter=",", header="position,intensity",
               comments="")
    code = main(["thickness", "--d-spacing-A", str(D_SI220), "--profile", str(prof),
                 "--json", str(tmp_path / "p.json"), "--figure", str(tmp_path / "p.png")])
    assert code == 0
    assert json.loads((tmp_path / "p.json").read_text())["profile"] is not None
    capsys.readouterr()
    # bad input: one line, exit 2
    code = main(["thickness", "--d-spacing-A", "1.92", "--separation-px", "400",
                 "--fringes-px", "30", "20"])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1
