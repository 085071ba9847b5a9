"""Shared helpers: synthetic crossings made with the forward model."""

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
