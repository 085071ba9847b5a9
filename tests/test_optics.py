import math

import pytest
from scipy import constants as C

from laueline.crystal import read_crystal
from laueline.errors import InputError
from laueline.optics import (make_beam, mean_inner_potential_V, relativistic_factor,
                             wave_number, wavelength_A)


@pytest.mark.parametrize("kv, lambda_nm", [(100, 0.00370), (200, 0.00251), (300, 0.00197)])
def test_wavelength_against_handbook_table(kv, lambda_nm):
    # Williams and Carter, Transmission Electron Microscopy (2009), Table 1.2,
    # relativistic wavelengths in nm to three significant figures (from memory).
    # Tolerance: half a unit of the table's last digit.
    assert wavelength_A(kv) / 10 == pytest.approx(lambda_nm, abs=0.5e-5)


@pytest.mark.parametrize("kv", [60, 100, 200, 300, 1000])
def test_wavelength_against_codata_energy_momentum_relation(kv):
    # CODATA constants via scipy.constants, by another route:
    # p c = sqrt(E (E + 2 m c^2)) with E the kinetic energy, lambda = h c / (p c).
    energy = C.e * kv * 1e3
    mc2 = C.m_e * C.c ** 2
    lam = C.h * C.c / math.sqrt(energy * (energy + 2 * mc2))
    # Both are exact closed forms in double precision.
    assert wavelength_A(kv) == pytest.approx(lam * 1e10, rel=1e-12)
    assert wave_number(kv) == pytest.approx(1 / (lam * 1e10), rel=1e-12)


def test_relativistic_factor_codata():
    # gamma = 1 + E / (m c^2); m_e c^2 = 510.999 keV (CODATA via scipy.constants)
    rest_kev = C.physical_constants["electron mass energy equivalent in MeV"][0] * 1e3
    assert relativistic_factor(200) == pytest.approx(1 + 200 / rest_kev, rel=1e-12)


def test_inner_potential_correction_equals_higher_kinetic_energy():
    # Inside the crystal the electron gains e V0 of kinetic energy, so the
    # corrected wave number is the vacuum one at V + V0 (to first order in
    # V0 / V; the neglected term is of relative size e V0 / (2 m c^2) ~ 1e-5
    # of the correction itself).
    si = read_crystal("Si")
    beam = make_beam(200, si, inner_potential=True)
    v0 = beam.inner_potential_V
    expected = wave_number(200 + v0 * 1e-3)
    assert beam.wave_number == pytest.approx(expected, rel=1e-9)


def test_mean_inner_potential_of_silicon_magnitude():
    # Neutral-atom (non-bonded) mean inner potential of Si: about 13-15 V;
    # measured values are near 12.5 V, lower because of bonding (from memory;
    # see Gajdardziska-Josifovska et al., Ultramicroscopy 50 (1993) 285).
    v0 = mean_inner_potential_V(read_crystal("Si"))
    assert 13.0 < v0 < 15.0


def test_mean_inner_potential_formula_with_gemmi_factors():
    # V0 = h^2 / (2 pi m0 e Omega) * sum f(0), with f(0) from gemmi's
    # International Tables C 4.3.2.2 coefficients and CODATA constants.
    import gemmi

    crystal = read_crystal("SrTiO3")
    f0 = sum(gemmi.Element(el).c4322.calculate_sf(0.0) for el in crystal.elements)
    v0 = C.h ** 2 / (2 * math.pi * C.m_e * C.e) * f0 * 1e-10 / (crystal.volume * 1e-30)
    # gemmi stores the coefficients in single precision.
    assert mean_inner_potential_V(crystal) == pytest.approx(v0, rel=1e-6)


@pytest.mark.parametrize("kv", [0, -200, float("nan")])
def test_bad_voltage(kv):
    with pytest.raises(InputError):
        wavelength_A(kv)
