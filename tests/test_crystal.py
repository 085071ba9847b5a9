import math
import textwrap

import gemmi
import numpy as np
import pytest
import spglib
from scipy import constants as C

from laueline.crystal import (basis_from_cell, bundled_structures, cell_from_basis,
                              read_crystal, strain_tensor)
from laueline.errors import InputError

ALL = bundled_structures()


def test_bundled_set_is_complete():
    for name in ["Si", "Ge", "GaAs", "Al", "Cu", "Ni", "alpha-Fe", "SrTiO3", "TiO2-rutile",
                 "Al2O3-corundum", "Mg", "ZrO2-baddeleyite"]:
        assert name in ALL
    assert any(read_crystal(n).space_group_number in range(3, 16) for n in ALL)  # monoclinic


def test_silicon_cell_is_codata():
    # CODATA 2018 lattice parameter of silicon (scipy.constants)
    a_codata = C.physical_constants["lattice parameter of silicon"][0] * 1e10
    cell = read_crystal("Si").cell
    assert cell[:3] == pytest.approx([a_codata] * 3, rel=1e-12)
    assert cell[3:] == pytest.approx([90, 90, 90], abs=1e-12)


@pytest.mark.parametrize("name, n_atoms", [("Si", 8), ("SrTiO3", 5), ("TiO2-rutile", 6),
                                           ("Al2O3-corundum", 30), ("GaAs", 8), ("Cu", 4),
                                           ("alpha-Fe", 2), ("Mg", 2),
                                           ("ZrO2-baddeleyite", 12)])
def test_atoms_per_cell(name, n_atoms):
    # Known cell contents (Z x formula): diamond 8, perovskite 5, rutile 2 x 3,
    # corundum 6 x 5, zinc blende 8, fcc 4, bcc 2, hcp 2, baddeleyite 4 x 3.
    assert read_crystal(name).n_sites == n_atoms


@pytest.mark.parametrize("name", ALL)
def test_space_group_against_spglib(name):
    # spglib on the expanded cell, called here independently of the library.
    c = read_crystal(name)
    types = [gemmi.Element(e).atomic_number for e in c.elements]
    data = spglib.get_symmetry_dataset((c.basis.T, c.fractional, types), symprec=1e-3)
    assert data.number == c.space_group_number
    assert not any("spglib" in n for n in c.notes)


@pytest.mark.parametrize("name", ALL)
def test_d_spacings_against_gemmi(name):
    c = read_crystal(name)
    cell = gemmi.UnitCell(*c.cell)
    rng = np.random.default_rng(1)
    hkl = rng.integers(-6, 7, size=(200, 3))
    hkl = hkl[np.any(hkl != 0, axis=1)]
    expected = np.array([cell.calculate_d(list(map(int, h))) for h in hkl])
    # identical cell, different code path: agreement to rounding
    np.testing.assert_allclose(c.d_spacing(hkl), expected, rtol=1e-10)


@pytest.mark.parametrize("name", ALL)
def test_absences_against_gemmi(name):
    c = read_crystal(name)
    ops = gemmi.SpaceGroup(c.space_group_symbol).operations()
    r = np.arange(-5, 6)
    hkl = np.stack(np.meshgrid(r, r, r, indexing="ij"), -1).reshape(-1, 3)
    hkl = hkl[np.any(hkl != 0, axis=1)]
    expected = np.array([ops.is_systematically_absent(list(map(int, h))) for h in hkl])
    np.testing.assert_array_equal(c.is_absent(hkl), expected)


def test_reciprocal_basis_conventions():
    c = read_crystal("ZrO2-baddeleyite")
    A, Astar = c.basis, c.reciprocal_basis
    np.testing.assert_allclose(Astar.T @ A, np.eye(3), atol=1e-14)
    # x along a, y in the a-b plane (gemmi / PDB orthogonalisation)
    assert abs(A[1, 0]) < 1e-14 and abs(A[2, 0]) < 1e-14 and abs(A[2, 1]) < 1e-14
    np.testing.assert_allclose(A, np.array(gemmi.UnitCell(*c.cell).orth.mat), atol=1e-12)
    np.testing.assert_allclose(cell_from_basis(basis_from_cell(*c.cell)), c.cell, atol=1e-12)


def test_diamond_selection_rules():
    si = read_crystal("Si")
    assert si.is_absent([[2, 0, 0]])[0]          # space-group absence (d glide)
    assert not si.is_absent([[2, 2, 2]])[0]      # allowed by the space group ...
    F = si.structure_factors([[1, 1, 1], [2, 2, 0], [2, 2, 2]])
    assert abs(F[2]) < 1e-12 * abs(F[0])         # ... but kinematically zero on 8a
    # |F111| : |F220| for the diamond structure, 4 sqrt(2) f(s111) : 8 f(s220),
    # each with exp(-B s^2); f from gemmi's International Tables C 4.3.2.2 table.
    f = gemmi.Element("Si").c4322
    B = 0.4632
    s2_111 = 3 / (4 * si.cell[0] ** 2)
    s2_220 = 8 / (4 * si.cell[0] ** 2)
    ratio = (4 * math.sqrt(2) * f.calculate_sf(s2_111) * math.exp(-B * s2_111)) / \
            (8 * f.calculate_sf(s2_220) * math.exp(-B * s2_220))
    # gemmi's coefficients are single precision
    assert abs(F[0]) / abs(F[1]) == pytest.approx(ratio, rel=1e-6)


def test_zinc_blende_200_present():
    # In GaAs (F-43m) 200 is allowed, |F200| = 4 |f_Ga - f_As| (textbook result).
    gaas = read_crystal("GaAs")
    assert not gaas.is_absent([[2, 0, 0]])[0]
    F = gaas.structure_factors([[2, 0, 0]])[0]
    s2 = 4 / (4 * gaas.cell[0] ** 2)
    fga = gemmi.Element("Ga").c4322.calculate_sf(s2) * math.exp(-0.60 * s2)
    fas = gemmi.Element("As").c4322.calculate_sf(s2) * math.exp(-0.55 * s2)
    assert abs(F) == pytest.approx(4 * abs(fga - fas), rel=1e-6)


def test_structure_factor_against_gemmi_direct_sum():
    # An independent direct sum over gemmi's own expanded sites.
    c = read_crystal("TiO2-rutile")
    st = gemmi.read_small_structure(str(_bundled_path("TiO2-rutile")))
    sites = st.get_all_unit_cell_sites()
    hkl = np.array([[1, 1, 0], [1, 0, 1], [2, 1, 1], [3, 1, 0], [0, 0, 2]])
    for h in hkl:
        stol2 = st.cell.calculate_1_d2(list(map(int, h))) / 4
        total = 0
        for s in sites:
            f = s.element.c4322.calculate_sf(stol2)
            B = 8 * math.pi ** 2 * s.u_iso
            total += s.occ * f * math.exp(-B * stol2) * np.exp(
                2j * math.pi * (h[0] * s.fract.x + h[1] * s.fract.y + h[2] * s.fract.z))
        # gemmi evaluates its single-precision coefficients in float arithmetic
        assert c.structure_factors([h])[0] == pytest.approx(total, rel=1e-6, abs=1e-9)


def _bundled_path(name):
    from importlib import resources
    return resources.files("laueline").joinpath("structures", name + ".cif")


def test_strained_and_with_cell():
    si = read_crystal("Si")
    e = [1e-3, -2e-3, 5e-4, 3e-4, -1e-4, 2e-4]
    s = si.strained(e)
    np.testing.assert_allclose(s.basis, (np.eye(3) + strain_tensor(e)) @ si.basis)
    np.testing.assert_array_equal(s.fractional, si.fractional)
    t = si.with_cell(5.4, 5.4, 5.5, 90, 90, 90)
    assert t.cell == pytest.approx([5.4, 5.4, 5.5, 90, 90, 90])
    with pytest.raises(InputError):
        si.strained([-1, 0, 0, 0, 0, 0])      # collapses the a axis
    with pytest.raises(InputError):
        si.with_cell(5, 5, 5, 90, 90, 190)


def test_b_iso_override_damps_high_order():
    si = read_crystal("Si")
    cold = si.with_b_iso(0.0)
    hkl = [[1, 1, 1], [8, 8, 8]]
    ratio = abs(si.structure_factors(hkl)) / abs(cold.structure_factors(hkl))
    s2 = 1 / (4 * np.asarray(si.d_spacing(hkl)) ** 2)
    # Debye-Waller factor exp(-B s^2)
    np.testing.assert_allclose(ratio, np.exp(-0.4632 * s2), rtol=1e-9)
    assert any("B set" in n for n in cold.notes)


# -- CIF reading ------------------------------------------------------------

SITES_BLOCK = """
loop_
_atom_site_label
_atom_site_type_symbol
_atom_site_fract_x
_atom_site_fract_y
_atom_site_fract_z
_atom_site_U_iso_or_equiv
"""


def write(tmp_path, text, name="x.cif"):
    p = tmp_path / name
    p.write_text(textwrap.dedent(text))
    return p


def test_cif_with_symmetry_operators_only(tmp_path):
    ops = gemmi.find_spacegroup_by_name("F d -3 m:1").operations()
    lines = "\n".join(f"'{op.triplet()}'" for op in ops)
    p = write(tmp_path, f"""
    data_si
    _cell_length_a 5.431
    _cell_length_b 5.431
    _cell_length_c 5.431
    _cell_angle_alpha 90
    _cell_angle_beta 90
    _cell_angle_gamma 90
    loop_
    _space_group_symop_operation_xyz
    {lines}
    """ + SITES_BLOCK + "Si1 Si 0 0 0 0.0059\n")
    c = read_crystal(p)
    assert c.n_sites == 8 and c.space_group_number == 227


def test_cif_origin_choice_resolved_from_hm_symbol(tmp_path):
    # Si on (0 0 0) is 8a only in origin choice 1; origin choice 2 would
    # generate 16 atoms with overlaps.
    p = write(tmp_path, """
    data_si
    _cell_length_a 5.431
    _cell_length_b 5.431
    _cell_length_c 5.431
    _cell_angle_alpha 90
    _cell_angle_beta 90
    _cell_angle_gamma 90
    _symmetry_space_group_name_H-M 'F d -3 m'
    """ + SITES_BLOCK + "Si1 Si 0 0 0 0.0059\n")
    c = read_crystal(p)
    assert c.n_sites == 8
    assert c.space_group_symbol.endswith(":1")
    assert any("origin choice" in n for n in c.notes)


def test_cif_anisotropic_and_occupancy(tmp_path):
    p = write(tmp_path, """
    data_t
    _cell_length_a 4.0
    _cell_length_b 4.0
    _cell_length_c 4.0
    _cell_angle_alpha 90
    _cell_angle_beta 90
    _cell_angle_gamma 90
    _symmetry_space_group_name_H-M 'P 1'
    loop_
    _atom_site_label
    _atom_site_type_symbol
    _atom_site_fract_x
    _atom_site_fract_y
    _atom_site_fract_z
    _atom_site_occupancy
    Cu1 Cu 0 0 0 0.5
    loop_
    _atom_site_aniso_label
    _atom_site_aniso_U_11
    _atom_site_aniso_U_22
    _atom_site_aniso_U_33
    _atom_site_aniso_U_12
    _atom_site_aniso_U_13
    _atom_site_aniso_U_23
    Cu1 0.01 0.02 0.03 0 0 0
    """)
    c = read_crystal(p)
    # U_eq = (U11 + U22 + U33) / 3 for an orthogonal cell (Fischer and Tillmanns 1988)
    assert c.b_iso[0] == pytest.approx(8 * math.pi ** 2 * 0.02, rel=1e-6)
    assert c.occupancy[0] == 0.5
    assert any("isotropic equivalent" in n for n in c.notes)


@pytest.mark.parametrize("text, message", [
    ("", "empty"),
    ("data_x\n_cell_length_a 4\nloop_\n_a\n_b\n1 2 3\n", "malformed"),
    ("this is not a CIF", "malformed"),
    ("data_x\n_atom_site_label A\n", "unit cell"),
    ("data_x\n_cell_length_a 4\n_cell_length_b 4\n_cell_length_c 4\n"
     "_cell_angle_alpha 90\n_cell_angle_beta 90\n_cell_angle_gamma 90\n", "no atom sites"),
    ("data_x\n_cell_length_a 4\n_cell_length_b 4\n_cell_length_c 4\n"
     "_cell_angle_alpha 90\n_cell_angle_beta 90\n_cell_angle_gamma 90\n"
     "loop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n"
     "_atom_site_fract_y\n_atom_site_fract_z\nQ1 Qq 0 0 0\n", "unknown element"),
])
def test_bad_cif(tmp_path, text, message):
    p = tmp_path / "bad.cif"
    p.write_text(text)
    with pytest.raises(InputError, match=message):
        read_crystal(p)


def test_unknown_name():
    with pytest.raises(InputError, match="unknown structure"):
        read_crystal("Unobtainium")


def test_names_resolve_by_part():
    assert read_crystal("rutile").name == "TiO2-rutile"
    assert read_crystal("si").name == "Si"


# -- disorder, alloys, validation, blocks, large cells ------------------------

def _direct_sum(path, hkl):
    """F(hkl) = sum occ f(s) exp(2 pi i h.x) over gemmi's own unit-cell site list
    (which is right for sites on special positions, not for split ones) with
    gemmi's International Tables C 4.3.2.2 factors, for B = 0."""
    small = gemmi.read_small_structure(str(path))
    cell = small.cell
    out = []
    for h in hkl:
        stol2 = cell.calculate_1_d2(list(h)) / 4 if any(h) else 0.0
        out.append(sum(site.occ * site.element.c4322.calculate_sf(stol2)
                       * np.exp(2j * np.pi * np.dot(h, site.fract.tolist()))
                       for site in small.get_all_unit_cell_sites()))
    return np.array(out)


def _gemmi_sf(path, hkl):
    """Electron structure factors from gemmi's own calculator (an independent sum
    over the site list and all symmetry operations, International Tables C 4.3.2.2
    factors), for B = 0."""
    small = gemmi.read_small_structure(str(path))
    small.setup_cell_images()
    calc = gemmi.StructureFactorCalculatorE(small.cell)
    return np.array([calc.calculate_sf_from_small_structure(small, h) for h in hkl])


SPLIT_SITE = """
data_split
_cell_length_a 5.0
_cell_length_b 6.0
_cell_length_c 7.0
_cell_angle_alpha 80
_cell_angle_beta 85
_cell_angle_gamma 95
_symmetry_space_group_name_H-M 'P -1'
loop_
_atom_site_label
_atom_site_type_symbol
_atom_site_fract_x
_atom_site_fract_y
_atom_site_fract_z
_atom_site_occupancy
Cu1 Cu 0.03 0 0 0.5
O1 O 0.3 0.2 0.4 1
"""


def test_split_site_keeps_its_total_occupancy(tmp_path):
    # Cu at x = 0.03 with occupancy 0.5 in P-1: its inversion image lies 0.3 A away,
    # an alternative position of one Cu atom.  F(000) must count one whole Cu.
    p = write(tmp_path, SPLIT_SITE)
    c = read_crystal(p)
    coefs = {el: sum(gemmi.Element(el).c4322.get_coefs()[:5]) for el in ("Cu", "O")}
    # f(0) = sum of the five Gaussian amplitudes a_i (International Tables C 4.3.2.2)
    assert c.forward_scattering() == pytest.approx(coefs["Cu"] + 2 * coefs["O"], rel=1e-9)
    hkl = [(0, 0, 0), (1, 0, 0), (2, 1, -1), (3, 0, 2), (1, -2, 3)]
    # gemmi's calculator works in single precision: agreement to 1e-6 relative
    np.testing.assert_allclose(c.structure_factors(hkl), _gemmi_sf(p, hkl), rtol=1e-6,
                               atol=1e-6)
    assert any("disorder" in n for n in c.notes)
    assert not any("closer than" in n and "pairs" in n for n in c.notes)


def test_special_position_keeps_the_given_occupancy(tmp_path):
    # Cu exactly on the inversion centre with occupancy 0.5: half an atom (CIF
    # convention, occupancy of the site), not a whole one
    p = write(tmp_path, SPLIT_SITE.replace("Cu1 Cu 0.03 0 0 0.5", "Cu1 Cu 0 0 0 0.5"))
    c = read_crystal(p)
    hkl = [(0, 0, 0), (1, 2, 0), (2, -1, 3)]
    # gemmi's factors are single precision: agreement to 1e-6 relative
    np.testing.assert_allclose(c.structure_factors(hkl), _direct_sum(p, hkl), rtol=1e-6,
                               atol=1e-6)
    assert c.elements.count("Cu") == 1


def test_alloy_on_shared_sites(tmp_path):
    # Si0.5Ge0.5 in the diamond structure: one site, two elements
    p = write(tmp_path, """
    data_sige
    _cell_length_a 5.54
    _cell_length_b 5.54
    _cell_length_c 5.54
    _cell_angle_alpha 90
    _cell_angle_beta 90
    _cell_angle_gamma 90
    _symmetry_space_group_name_H-M 'F d -3 m:1'
    loop_
    _atom_site_label
    _atom_site_type_symbol
    _atom_site_fract_x
    _atom_site_fract_y
    _atom_site_fract_z
    _atom_site_occupancy
    Si1 Si 0 0 0 0.5
    Ge1 Ge 0 0 0 0.5
    """)
    c = read_crystal(p)
    assert any("share sites" in n and "Ge" in n and "Si" in n for n in c.notes)
    assert not any("pairs of atoms" in n for n in c.notes)
    hkl = [(0, 0, 0), (1, 1, 1), (2, 2, 0), (3, 1, 1)]
    np.testing.assert_allclose(c.structure_factors(hkl), _direct_sum(p, hkl), rtol=1e-6,
                               atol=1e-6)
    assert c.formula == "SiGe"


CELL_90 = ("data_x\n_cell_length_a 4\n_cell_length_b 4\n_cell_length_c 4\n"
           "_cell_angle_alpha {al}\n_cell_angle_beta {be}\n_cell_angle_gamma {ga}\n"
           "_symmetry_space_group_name_H-M 'P 1'\n")
SITE_COLUMNS = ("loop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n"
                "_atom_site_fract_y\n_atom_site_fract_z\n_atom_site_occupancy\n"
                "_atom_site_B_iso_or_equiv\n")


@pytest.mark.parametrize("angles, row, message", [
    # metric determinant 1 - 3 cos^2 + 2 cos^3 < 0 for 150 deg: no cell
    ((150, 150, 150), "Cu1 Cu 0 0 0 1 0.5", "do not form a cell"),
    ((60, 60, 170), "Cu1 Cu 0 0 0 1 0.5", "do not form a cell"),
    ((90, 90, 90), "Cu1 Cu ? 0 0 1 0.5", "unknown"),
    ((90, 90, 90), "Cu1 Cu 0 0 half 1 0.5", "not a finite number"),
    ((90, 90, 90), "Cu1 Cu 0 0 0 3 0.5", "occupancy 3"),
    ((90, 90, 90), "Cu1 Cu 0 0 0 -1 0.5", "occupancy -1"),
    ((90, 90, 90), "Cu1 Cu 0 0 0 1 -20", "non-negative"),
    ((90, 90, 90), "Cu1 Cu 0 0 0 0.7 0.5\nNi1 Ni 0 0 0 0.6 0.5", "total occupancy"),
])
def test_cif_values_checked_before_symmetry_libraries(tmp_path, angles, row, message):
    text = CELL_90.format(al=angles[0], be=angles[1], ga=angles[2]) + SITE_COLUMNS + row + "\n"
    p = tmp_path / "bad.cif"
    p.write_text(text)
    with pytest.raises(InputError, match=message):
        read_crystal(p)


def test_several_blocks_need_a_choice(tmp_path):
    one = CELL_90.format(al=90, be=90, ga=90) + SITE_COLUMNS + "Cu1 Cu 0 0 0 1 0.5\n"
    p = tmp_path / "two.cif"
    p.write_text(one + one.replace("data_x", "data_y").replace("Cu1 Cu", "Ni1 Ni"))
    with pytest.raises(InputError, match="--block"):
        read_crystal(p)
    assert read_crystal(p, block="y").elements == ("Ni",)
    assert read_crystal(p, block="X").elements == ("Cu",)  # CIF block names ignore case
    with pytest.raises(InputError, match="no data block named 'z'"):
        read_crystal(p, block="z")


def test_close_pairs_match_a_brute_force_search():
    from laueline.crystal import _close_pairs

    rng = np.random.default_rng(5)
    frac = rng.random((200, 3))
    orth = basis_from_cell(7.0, 8.0, 6.5, 80, 100, 110)
    i, j, dist = _close_pairs(frac, orth, 1.2)
    # brute force: every pair against every neighbouring lattice translation (-1..1
    # suffices: the cell is over 5 A wide in every direction, the radius 1.2 A)
    shifts = np.stack(np.meshgrid(*[np.arange(-1, 2)] * 3, indexing="ij"), -1).reshape(-1, 3)
    diff = frac[:, None, None, :] - frac[None, :, None, :] + shifts
    d = np.linalg.norm(diff @ orth.T, axis=-1).min(axis=2)
    bi, bj = np.nonzero(np.triu(d < 1.2, 1))
    assert set(zip(i.tolist(), j.tolist())) == set(zip(bi.tolist(), bj.tolist()))
    np.testing.assert_allclose(dist, d[i, j], rtol=1e-12)


def test_structure_factor_work_refused_before_it_starts():
    import dataclasses

    from laueline.crystal import MAX_STRUCTURE_FACTOR_TERMS

    si = read_crystal("Si")
    n = MAX_STRUCTURE_FACTOR_TERMS // 1000 + 1
    big = dataclasses.replace(si, fractional=np.zeros((n, 3)), elements=("Si",) * n,
                              occupancy=np.ones(n), b_iso=np.zeros(n))
    with pytest.raises(InputError, match="limit"):
        big.structure_factors(np.ones((1000, 3)))
