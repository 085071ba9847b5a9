"""Shared helpers: synthetic crossings from the forward model and from an independent
Ewald-sphere construction."""

import math

import numpy as np
import pytest

from laueline import predict, read_crystal
from laueline.detector import Detector
from laueline.points import Points

# An invented detector for synthetic data (px, px/mrad, deg).
DETECTOR = Detector((256.4, 249.7), 40.0, 17.0, False)


def strongest_crossings(pattern, n):
    """Indices of the n crossings whose weaker line is strongest."""
    weaker = np.minimum(pattern.strength[pattern.crossing_lines[:, 0]],
                        pattern.strength[pattern.crossing_lines[:, 1]])
    return np.argsort(-weaker, kind="stable")[:n]


def synthetic_points(crystal, zone, *, n=40, kv=200.0, strain=None, detector=DETECTOR,
                     noise_px=0.0, rng=None, labelled=True, x_axis=(0, 0, 4), disk_mrad=6.0):
    """Crossings of ``crystal`` (optionally strained) as measured pixels."""
    pattern = predict(crystal, zone, kv, disk_mrad, strain=strain, x_axis=x_axis)
    idx = strongest_crossings(pattern, n)
    xy = detector.to_pixels(pattern.crossing_mrad[idx])
    if noise_px:
        xy = xy + rng.normal(0.0, noise_px, xy.shape)
    ha, hb = pattern.crossing_hkl()
    if labelled:
        return Points(xy, ha[idx], hb[idx])
    return Points(xy)


@pytest.fixture(scope="session")
def si():
    return read_crystal("Si")


def run_cli(capsys, *argv):
    """Run the command line in-process: (exit status, stdout, stderr).

    Argument errors leave through SystemExit; its code is the status.
    """
    from laueline.cli import main

    try:
        code = main([str(a) for a in argv])
    except SystemExit as exc:
        code = exc.code
    out, err = capsys.readouterr()
    return code, out, err


def pytest_configure(config):
    config.addinivalue_line(
        "markers", "slow: runs whole workflows (the README, the walkthrough); CI runs them "
                   "in a second step, deselect with -m 'not slow'")


# -- an independent Ewald-sphere construction of crossings -----------------------
# Built here from the definitions (DESIGN.md), not from laueline.frame or
# laueline.lines: the disk frame by hand, the excitation error
# s_g = (K^2 - |k + g|^2) / (2K), and both lines' Bragg conditions solved
# together by a general root finder (scipy.optimize.root, MINPACK's hybrid method).

def electron_wave_number(kv):
    """1/lambda in 1/A, relativistic, from CODATA constants (scipy.constants)."""
    from scipy import constants as c

    e_v = c.e * kv * 1e3
    return 1e-10 * math.sqrt(2 * c.m_e * e_v * (1 + e_v / (2 * c.m_e * c.c ** 2))) / c.h


def ewald_frame(basis, zone, x_axis):
    """x, y, B built from the definitions: B along A [uvw], x along A^-T h normal to B."""
    beam = basis @ np.asarray(zone, float)
    beam /= np.linalg.norm(beam)
    gx = np.linalg.solve(basis.T, np.asarray(x_axis, float))
    gx -= (gx @ beam) * beam
    gx /= np.linalg.norm(gx)
    return gx, np.cross(beam, gx), beam


def excitation_error(t, g, frame, K):
    """s_g for the incidence of tangential part t (radians)."""
    x, y, beam = frame
    k = K * (t[0] * x + t[1] * y - math.sqrt(1 - t[0] ** 2 - t[1] ** 2) * beam)
    return (K * K - np.sum((k + g) ** 2)) / (2 * K)


def ewald_crossings(basis, zone, x_axis, K, hkl_a, hkl_b, guess_mrad):
    """Crossings (mrad) where both lines' excitation errors vanish, solved from a guess."""
    from scipy.optimize import root

    frame = ewald_frame(basis, zone, x_axis)
    recip = np.linalg.inv(basis).T
    out = []
    for ha, hb, t0 in zip(hkl_a, hkl_b, guess_mrad):
        ga, gb = recip @ np.asarray(ha, float), recip @ np.asarray(hb, float)
        def both(t):
            return [excitation_error(t, ga, frame, K), excitation_error(t, gb, frame, K)]

        t = root(both, np.asarray(t0) * 1e-3, method="hybr", tol=1e-14).x
        # |grad s| ~ G ~ 0.5 1/A per radian: 1e-13 1/A is 2e-10 mrad off the loci
        assert np.max(np.abs(both(t))) < 1e-13
        out.append(t * 1e3)
    return np.array(out)


def ewald_points(crystal, zone, x_axis, strain_e, detector, *, n=40, kv=200.0,
                 noise_px=0.0, rng=None, disk_mrad=6.0):
    """Labelled crossings of the basis (I + e) A, by the independent Ewald construction.

    Only the choice of line pairs and the starting points come from the
    forward model's prediction of the unstrained crystal.
    """
    pattern = predict(crystal, zone, kv, disk_mrad, x_axis=x_axis)
    idx = strongest_crossings(pattern, n)
    ha, hb = pattern.crossing_hkl()
    basis = (np.eye(3) + _tensor(strain_e)) @ crystal.basis
    t = ewald_crossings(basis, zone, x_axis, electron_wave_number(kv), ha[idx], hb[idx],
                        pattern.crossing_mrad[idx])
    xy = detector.to_pixels(t)
    if noise_px:
        xy = xy + rng.normal(0.0, noise_px, xy.shape)
    return Points(xy, ha[idx], hb[idx])


def _tensor(e):
    xx, yy, zz, yz, xz, xy = e
    return np.array([[xx, xy, xz], [xy, yy, yz], [xz, yz, zz]], float)


def green_lagrange_of(e):
    """Six components of E = ((I + e)^T (I + e) - I) / 2 for symmetric e, by hand."""
    f = np.eye(3) + _tensor(e)
    m = 0.5 * (f.T @ f - np.eye(3))
    return np.array([m[0, 0], m[1, 1], m[2, 2], m[1, 2], m[0, 2], m[0, 1]])
