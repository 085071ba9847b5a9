"""Exact strain constraints in the sample frame, against Hooke's law for thin layers."""

import numpy as np
import pytest
from conftest import DETECTOR, ewald_points

from laueline.errors import InputError
from laueline.fit import Calibration, refine, strain_constraints
from laueline.report import fit_text
from laueline.strain import cubic_stiffness, sample_axes, voigt, voigt_rotation

# Si elastic constants, GPa (Hopcroft, Nix and Kenny, J. MEMS 19 (2010) 229,
# after McSkimin 1953; from memory)
C11, C12, C44 = 165.7, 63.9, 79.6
SI_C = cubic_stiffness(C11, C12, C44)
CAL = Calibration(200.0, DETECTOR)

# A layer strained equally in its plane and free of stress along its normal
# has e_perp = -D e_par with (Hooke's law for cubic crystals; e.g. Hornstra
# and Bartels, J. Cryst. Growth 44 (1978) 513, from memory):
#   (001): D = 2 C12 / C11
#   (110): D = (C11 + 3 C12 - 2 C44) / (C11 + C12 + 2 C44)
#   (111): D = 2 (C11 + 2 C12 - 2 C44) / (C11 + 2 C12 + 4 C44)
FOILS = [((1, 0, 0), (0, 0, 1), 2 * C12 / C11),
         ((1, -1, 0), (1, 1, 0), (C11 + 3 * C12 - 2 * C44) / (C11 + C12 + 2 * C44)),
         ((1, -1, 0), (1, 1, 1), 2 * (C11 + 2 * C12 - 2 * C44) / (C11 + 2 * C12 + 4 * C44))]


@pytest.mark.parametrize("x_dir, normal, D", FOILS)
def test_zero_normal_stress_gives_the_biaxial_relation(si, x_dir, normal, D):
    axes = sample_axes(si.basis, x_dir, normal)
    c = strain_constraints(si.basis, hold={"eyz": 0, "exz": 0, "exy": 0}, sample_axes=axes,
                           biaxial=True, zero_normal_stress=True, stiffness=SI_C)
    assert c.basis.shape == (6, 1)  # one free strain: the in-plane one
    s = voigt_rotation(axes) @ c.expand([1e-3])
    # exact linear algebra: agreement to rounding
    assert s[0] == pytest.approx(s[1], abs=1e-15)
    assert s[2] / s[0] == pytest.approx(-D, rel=1e-12)


def test_constrained_fit_honours_the_constraints_exactly(si):
    # a (001) layer under biaxial compression, e_zz from the relation above,
    # crossings by the independent Ewald construction, 0.1 px noise
    e_par = -1.5e-3
    truth = np.array([e_par, e_par, -2 * C12 / C11 * e_par, 0, 0, 0])
    pts = ewald_points(si, (2, 3, 0), (0, 0, 4), truth, DETECTOR, noise_px=0.1,
                       rng=np.random.default_rng(3))
    axes = sample_axes(si.basis, (1, 0, 0), (0, 0, 1))
    fit = refine(si, (2, 3, 0), pts, x_axis=(0, 0, 4), calibration=CAL, mirror=False,
                 stiffness=SI_C, sample_axes=axes, zero_normal_stress=True, biaxial=True,
                 hold_strain={"exy": 0, "exz": 0, "eyz": 0})
    st = fit.strain
    assert fit.success and fit.parameters[:1] == ["mode1"]
    # exactly (to rounding, 1e-15 of a strain of 1e-3): equal in-plane strains;
    # fixed components are reported as exact zeros
    assert st.sample_green_lagrange[0, 0] == pytest.approx(st.sample_green_lagrange[1, 1],
                                                           abs=1e-15)
    assert st.sample_green_lagrange[0, 1] == 0 and st.sample_green_lagrange[1, 2] == 0
    assert st.sample_stress_GPa[2, 2] == 0 and st.sample_stress_sigma_GPa[2, 2] == 0
    assert set(fit.fixed_components["sample"]) >= {"eyz", "exz", "exy"}
    # the one free strain within 3 sigma (Green-Lagrange differs from the
    # small strain by e^2 / 2 ~ 1e-6, far below sigma)
    sigma = st.sample_green_lagrange_sigma[0, 0]
    assert abs(st.sample_green_lagrange[0, 0] - e_par) < 3 * sigma
    assert len(fit.constraints) == 5
    text = fit_text(fit)
    assert "constraints (exact)" in text and "fixed by the constraints" in text
    assert "e-17" not in text and "e-22" not in text


def test_held_component_in_crystal_frame(si):
    pts = ewald_points(si, (2, 3, 0), (0, 0, 4), [1e-3, 0, 0, 0, 0, 0], DETECTOR)
    fit = refine(si, (2, 3, 0), pts, x_axis=(0, 0, 4), calibration=CAL, mirror=False,
                 hold_strain={"exy": 0, "eyz": 0, "exz": 0})
    assert voigt(fit.strain.green_lagrange)[3:].tolist() == [0.0, 0.0, 0.0]
    assert fit.strain.green_lagrange[0, 0] == pytest.approx(1e-3 + 0.5e-6, abs=1e-8)


def test_bad_constraints(si):
    axes = sample_axes(si.basis, (1, 0, 0), (0, 0, 1))
    with pytest.raises(InputError, match="contradict"):
        strain_constraints(si.basis, hold={"exx": 1e-3, "eyy": 0.0}, sample_axes=axes,
                           biaxial=True)
    with pytest.raises(InputError, match="nothing to fit"):
        strain_constraints(si.basis, hold={n: 0 for n in ("exx", "eyy", "ezz", "eyz", "exz",
                                                          "exy")})
    with pytest.raises(InputError, match="stiffness"):
        strain_constraints(si.basis, sample_axes=axes, zero_normal_stress=True)
    with pytest.raises(InputError, match="sample frame"):
        strain_constraints(si.basis, biaxial=True)
