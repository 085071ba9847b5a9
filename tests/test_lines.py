"""The forward model against independent constructions."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import brentq
from scipy.spatial.transform import Rotation

from laueline.crystal import read_crystal
from laueline.errors import InputError
from laueline.lines import crossing_positions, predict, ring_radius_mrad

SI = read_crystal("Si")


@pytest.fixture(scope="module")
def si230():
    return predict(SI, [2, 3, 0], kv=200, disk_mrad=6)


# -- an independent brute-force Ewald-sphere construction --------------------

def _frame_by_hand(crystal, zone, x_axis):
    """x, y, B built here from the definitions, not from laueline.frame."""
    beam = crystal.basis @ np.asarray(zone, float)
    beam /= np.linalg.norm(beam)
    gx = np.linalg.solve(crystal.basis.T, np.asarray(x_axis, float))  # A^-T h
    gx -= (gx @ beam) * beam
    gx /= np.linalg.norm(gx)
    return gx, np.cross(beam, gx), beam


def _excitation_error(t, g, frame, K):
    """s_g = (K^2 - |k + g|^2) / (2 K) for incidence tangential part t (radians)."""
    x, y, beam = frame
    k = K * (t[0] * x + t[1] * y - math.sqrt(1 - t[0] ** 2 - t[1] ** 2) * beam)
    return (K * K - np.sum((k + g) ** 2)) / (2 * K)


def _brute_force_points(g, frame, K, radius, n_scan=41):
    """Bracket the sign change of s_g along scan lines across the disk."""
    points = []
    for along_y in (True, False):
        for c in np.linspace(-radius, radius, n_scan)[1:-1]:
            def s(u):
                t = (c, u) if along_y else (u, c)
                return _excitation_error(t, g, frame, K)
            half = math.sqrt(radius ** 2 - c ** 2)
            grid = np.linspace(-half, half, 200)
            vals = np.array([s(u) for u in grid])
            for k in np.flatnonzero(np.sign(vals[:-1]) != np.sign(vals[1:])):
                u = brentq(s, grid[k], grid[k + 1], xtol=1e-16, rtol=1e-15)
                points.append((c, u) if along_y else (u, c))
    return np.array(points)


def _distance_to_polyline(points, polyline):
    a, b = polyline[:-1], polyline[1:]
    ab = b - a
    d = []
    for p in points:
        u = np.clip(np.sum((p - a) * ab, axis=1) / np.sum(ab * ab, axis=1), 0, 1)
        d.append(np.min(np.linalg.norm(a + u[:, None] * ab - p, axis=1)))
    return np.array(d)


def test_loci_against_brute_force_ewald_scan(si230):
    frame = _frame_by_hand(SI, [2, 3, 0], si230.x_axis)
    K = si230.beam.wave_number
    radius = si230.disk_mrad * 1e-3
    strongest = np.argsort(-si230.strength)[:8]
    for i in strongest:
        g = SI.g_vectors([si230.hkl[i]])[0]
        brute = _brute_force_points(g, frame, K, radius) * 1e3
        assert len(brute) > 10
        # The target is 1e-5 mrad; the 64-point polyline's own chord
        # error is below 1e-6 mrad for these curvatures.
        assert np.max(_distance_to_polyline(brute, si230.points_mrad[i])) < 1e-5


def test_crossings_against_brute_force(si230):
    frame = _frame_by_hand(SI, [2, 3, 0], si230.x_axis)
    K = si230.beam.wave_number
    top = set(np.argsort(-si230.strength)[:10].tolist())
    checked = 0
    for (a, b), xy in zip(si230.crossing_lines, si230.crossing_mrad):
        if a not in top or b not in top:
            continue
        ga, gb = SI.g_vectors(si230.hkl[[a, b]])
        t0 = xy * 1e-3
        # Walk along line a (found by bracketing s_a across it) and bracket s_b.
        na = si230.normal[a]
        along = np.array([-na[1], na[0]])

        def on_a(u):
            centre = t0 + u * along
            return brentq(lambda v: _excitation_error(centre + v * na, ga, frame, K),
                          -2e-4, 2e-4, xtol=1e-17, rtol=1e-15)

        def s_b(u):
            return _excitation_error(t0 + u * along + on_a(u) * na, gb, frame, K)

        u = brentq(s_b, -2e-4, 2e-4, xtol=1e-17, rtol=1e-15)
        brute = (t0 + u * along + on_a(u) * na) * 1e3
        # accuracy asked: 1e-4 mrad; Newton converges to rounding
        assert np.linalg.norm(brute - xy) < 1e-6
        checked += 1
    assert checked >= 10


def test_points_on_exact_locus_and_span_the_chord(si230):
    from laueline.lines import line_parameters, locus_residual

    g = SI.g_vectors(si230.hkl)
    params = line_parameters(g, si230.frame, si230.beam.wave_number)
    residual = locus_residual(si230.points_mrad * 1e-3, params)
    assert np.max(np.abs(residual)) * 1e3 < 1e-10  # mrad; the target is 1e-5
    assert si230.points_mrad.shape[1] >= 50
    ends = np.linalg.norm(si230.points_mrad[:, [0, -1]], axis=2)
    np.testing.assert_allclose(ends, si230.disk_mrad, rtol=1e-9)


def test_holz_ring_radius_against_jones_rackham_steeds(si230):
    # Jones, Rackham and Steeds (1977): G = sqrt(2 K n H).  Their relation
    # drops (nH)^2 against 2KnH and uses the small-angle form angle = G/K;
    # the two neglected terms bound the difference.
    K = si230.beam.wave_number
    H = si230.frame.layer_spacing
    assert H == pytest.approx(1 / (SI.cell[0] * math.sqrt(13)), rel=1e-12)
    for n, r in zip(si230.ring_layers, si230.ring_radius_mrad):
        G = math.sqrt(2 * K * n * H)
        small_angle = 1e3 * G / K
        bound = n * H / (4 * K) + (G / K) ** 2 / 6
        assert abs(r / small_angle - 1) < 1.05 * bound


def test_fcc_110_first_layer_is_empty():
    # F centring: layer n = h + k = 1 of [110] holds only mixed-parity indices.
    cu = read_crystal("Cu")
    p = predict(cu, [1, 1, 0], gmax=6)
    assert 1 not in p.ring_layers and 2 in p.ring_layers


def test_strength_normalisation(si230):
    holz = si230.laue_zone >= 1
    assert si230.strength[holz].max() == pytest.approx(1.0)
    assert np.all(si230.strength >= 0.05)


def test_zero_layer_lines_only_beyond_their_bragg_angle():
    # Si [110]: the 111 reflections sit at theta_B = asin(lambda / 2 d111).
    from laueline.optics import wavelength_A

    theta = 1e3 * math.asin(wavelength_A(200) / (2 * SI.d_spacing([[1, 1, 1]])[0]))
    small = predict(SI, [1, 1, 0], disk_mrad=theta * 0.98)
    large = predict(SI, [1, 1, 0], disk_mrad=theta * 1.02)
    assert not np.any(small.laue_zone == 0)
    zolz = large.hkl[large.laue_zone == 0]
    assert len(zolz) == 4 and set(map(tuple, np.abs(zolz))) == {(1, 1, 1)}
    # ZOLZ lines are exactly straight: offset = -theta_B (sin form) for each
    np.testing.assert_allclose(np.abs(large.offset_mrad[large.laue_zone == 0]),
                               1e3 * wavelength_A(200) / (2 * SI.d_spacing([[1, 1, 1]])[0]),
                               rtol=1e-12)


def test_max_convergence_si_001():
    # Si [001]: the nearest zero-layer disks are 220 (200 is absent and no sum
    # of allowed reflections reaches it); the disks touch at theta_B(220).
    from laueline.optics import wavelength_A

    p = predict(SI, [0, 0, 1])
    theta = 1e3 * math.asin(wavelength_A(200) / (2 * SI.d_spacing([[2, 2, 0]])[0]))
    assert p.max_convergence_mrad == pytest.approx(theta, rel=1e-12)
    assert p.frame.x_axis == (2, 2, 0)


def test_double_diffraction_disk_counts_for_overlap():
    # Rutile [001]: 100 and 010 are absent (glide), yet their disks appear by
    # double diffraction, 100 = 210 + (-1 -1 0), both allowed: a textbook
    # case (e.g. Williams and Carter, ch. 20, on forbidden reflections; from
    # memory).  The disk overlap is therefore set by 100, not by 110.
    ru = read_crystal("rutile")
    assert ru.is_absent([[1, 0, 0]])[0] and not ru.is_absent([[2, 1, 0], [1, 1, 0]]).any()
    p = predict(ru, [0, 0, 1], gmax=3)
    assert sorted(np.abs(p.overlap_hkl).tolist()) == [0, 0, 1]
    # Si [110]: 002 is reached by 1-11 + -111; the nearest is still 111.
    q = predict(SI, [1, 1, 0])
    assert sorted(np.abs(q.overlap_hkl).tolist()) == [1, 1, 1]


# -- invariances -------------------------------------------------------------

def test_rigid_rotation_changes_nothing(si230):
    Q = Rotation.from_rotvec([0.3, -1.1, 0.7]).as_matrix()
    turned = predict(SI.with_basis(Q @ SI.basis), [2, 3, 0], x_axis=si230.x_axis)
    np.testing.assert_array_equal(turned.hkl, si230.hkl)
    np.testing.assert_allclose(turned.points_mrad, si230.points_mrad, atol=1e-10)
    np.testing.assert_allclose(turned.crossing_mrad, si230.crossing_mrad, atol=1e-10)


def _point_group_cartesian(crystal):
    A = crystal.basis
    return [A @ R @ np.linalg.inv(A) for R in crystal.point_group_rotations()]


def test_symmetry_equivalent_zone_axes_give_congruent_patterns(si230):
    # For each operation R of m-3m: zone R[uvw], x axis h R^-1 (reflections
    # transform contragrediently).  Proper operations give the same pattern,
    # improper ones its mirror image ty -> -ty (the frame y = B x x flips).
    for R in SI.point_group_rotations()[::7]:
        zone = R @ np.array([2, 3, 0])
        x_axis = np.array(si230.x_axis) @ np.linalg.inv(R)
        other = predict(SI, zone, x_axis=np.round(x_axis).astype(int))
        sign = np.linalg.det(R)
        ours = np.sort(si230.crossing_mrad[:, 0] + 1e3 * si230.crossing_mrad[:, 1])
        theirs = np.sort(other.crossing_mrad[:, 0] + sign * 1e3 * other.crossing_mrad[:, 1])
        assert other.n_crossings == si230.n_crossings
        np.testing.assert_allclose(theirs, ours, atol=1e-9)


def test_straight_line_form_converges_as_disk_shrinks():
    # The straight-line form drops sqrt(1 - t^2) ~ 1 - t^2/2: inside a disk
    # of radius alpha its error is at most gz (1 - sqrt(1 - alpha^2)) / G,
    # quadratic in alpha.
    deviations = []
    radii = [6.0, 3.0, 1.5]
    for r in radii:
        p = predict(SI, [1, 1, 1], kv=200, disk_mrad=r, min_strength=0.0)
        holz = np.flatnonzero(p.laue_zone >= 1)
        alpha = r * 1e-3
        g = SI.g_vectors(p.hkl[holz])
        gz = g @ p.frame.beam_direction
        G = np.linalg.norm(g - gz[:, None] * p.frame.beam_direction, axis=1)
        across = np.einsum("ijk,ik->ij", p.points_mrad[holz], p.normal[holz])
        dev = np.max(np.abs(across - p.offset_mrad[holz][:, None]), axis=1)
        bound = 1e3 * gz * (1 - math.sqrt(1 - alpha ** 2)) / G
        assert np.all(dev <= bound * (1 + 1e-6))
        deviations.append(dev.max())
    assert deviations[1] < deviations[0] / 3 and deviations[2] < deviations[1] / 3


def test_strain_argument_matches_strained_basis():
    e = [2e-3, -1e-3, 5e-4, 1e-4, -3e-4, 2e-4]
    a = predict(SI, [2, 3, 0], strain=e, x_axis=(0, 0, 4))
    b = predict(SI.strained(e), [2, 3, 0], x_axis=(0, 0, 4))
    np.testing.assert_allclose(a.crossing_mrad, b.crossing_mrad, atol=1e-12)
    assert a.strain is not None and b.strain is None


def test_hydrostatic_strain_mimics_voltage(si230):
    # DESIGN.md: a hydrostatic strain e and a wave number K / (1 + e) give the
    # same lines (all g scale by 1 / (1 + e)).
    e = 1e-3
    a = predict(SI, [2, 3, 0], strain=[e, e, e, 0, 0, 0], x_axis=si230.x_axis)
    b = predict(SI, [2, 3, 0], x_axis=si230.x_axis,
                wave_number=si230.beam.wave_number * (1 + e))
    np.testing.assert_allclose(a.crossing_mrad, b.crossing_mrad, atol=1e-10)


@settings(max_examples=25, deadline=None)
@given(st.lists(st.floats(-3e-3, 3e-3), min_size=6, max_size=6))
def test_crossings_satisfy_both_loci(e):
    from laueline.lines import line_parameters, locus_residual

    p = predict(SI, [1, 1, 4], strain=e, disk_mrad=5)
    ga, gb = (p.crystal.g_vectors(h) for h in p.crossing_hkl())
    K = p.beam.wave_number
    t = p.crossing_mrad * 1e-3
    for g in (ga, gb):
        res = locus_residual(t, line_parameters(g, p.frame, K))
        assert np.max(np.abs(res)) < 1e-14  # radians, rounding level
    assert np.all(np.linalg.norm(p.crossing_mrad, axis=1) <= 5 + 1e-9)
    assert np.all(p.crossing_angle_deg >= 5)


def test_crossing_positions_reuses_the_forward_model(si230):
    ha, hb = si230.crossing_hkl()
    xy = crossing_positions(SI.basis, si230.zone, si230.x_axis, si230.beam.wave_number, ha, hb)
    np.testing.assert_allclose(xy, si230.crossing_mrad, atol=1e-12)


def test_ring_radius_function():
    # Zero layer: no ring
    assert ring_radius_mrad(0, 0.1, 40.0) == 0.0


@pytest.mark.parametrize("kwargs, message", [
    (dict(zone=[0, 0, 0]), "no direction"),
    (dict(zone=[1, 1, 0], x_axis=[1, 0, 0]), "not normal"),
    (dict(zone=[1, 1, 0], kv=0), "positive"),
    (dict(zone=[1, 1, 0], disk_mrad=-1), "positive"),
    (dict(zone=[1, 1, 0], gmax=80), "limit"),
    (dict(zone=[1, 1, 0], strain=[-1, 0, 0, 0, 0, 0]), "singular"),
])
def test_bad_input(kwargs, message):
    with pytest.raises(InputError, match=message):
        predict(SI, **kwargs)
