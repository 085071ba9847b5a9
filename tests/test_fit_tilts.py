"""Relative orientation of patterns from the holder's tilt readings."""

import math

import numpy as np
import pytest
from conftest import ewald_frame, ewald_points, green_lagrange_of
from scipy.spatial.transform import Rotation

from laueline.detector import Detector
from laueline.errors import InputError
from laueline.fit import Calibration, PatternSpec, refine_patterns, tilt_rotation
from test_fit_joint import E_TRUE, ZONES


@pytest.mark.parametrize("first, second", [(0, 0), (23.5, -11.0), (-40.0, 35.0)])
def test_tilt_rotation_against_scipy_composition(first, second):
    # intrinsic X then Y (the second axis carried by the first) ...
    expected = Rotation.from_euler("XY", [first, second], degrees=True).as_matrix()
    np.testing.assert_allclose(tilt_rotation((first, second)), expected, atol=1e-14)
    # ... equals a turn about the holder's x followed by one about the tilted y
    rx = Rotation.from_rotvec(math.radians(first) * np.array([1.0, 0, 0]))
    carried_y = rx.apply([0.0, 1.0, 0.0])
    composed = Rotation.from_rotvec(math.radians(second) * carried_y) * rx
    np.testing.assert_allclose(tilt_rotation((first, second)), composed.as_matrix(),
                               atol=1e-14)


def _tilts_bringing_to_beam(u):
    """Readings (first, second) with Rx(first) Ry(second) u = z, solved by hand."""
    second = math.atan2(-u[0], u[2])
    v = Rotation.from_euler("Y", second).apply(u)
    first = math.atan2(v[1], v[2])
    return math.degrees(first), math.degrees(second)


def _tilted_specs(si, theta0=21.0, spoil=0.0):
    U = Rotation.from_euler("ZXZ", [10.0, 35.0, -20.0], degrees=True)  # invented mounting
    specs, rng = [], np.random.default_rng(2)
    for k, (zone, x_axis) in enumerate(ZONES):
        b = si.basis @ np.asarray(zone, float)
        tilt = _tilts_bringing_to_beam(U.apply(b / np.linalg.norm(b)))
        beam = Rotation.from_euler("XY", tilt, degrees=True) * U
        assert np.allclose(beam.apply(b / np.linalg.norm(b)), [0, 0, 1], atol=1e-12)
        # the disk x axis in the holder frame sets this pattern's turn on the camera
        w = beam.apply(ewald_frame(si.basis, zone, x_axis)[0])
        rotation = theta0 + math.degrees(math.atan2(w[1], w[0]))
        det = Detector((250.0 + 4 * k, 252.0 - 3 * k), 40.0, rotation)
        pts = ewald_points(si, zone, x_axis, E_TRUE, det, n=30, rng=rng)
        reading = (tilt[0] + (spoil if k == 2 else 0.0), tilt[1])
        start = det.replace(center_px=(252.0, 250.0), rotation_deg=rotation + 1.0)
        specs.append(PatternSpec(zone, points=pts, x_axis=x_axis, tilt_deg=reading,
                                 calibration=Calibration(200.0, start)))
    return specs


def test_joint_fit_with_tilts(si):
    fit = refine_patterns(si, _tilted_specs(si))
    assert fit.success
    # one camera rotation for all three patterns, not three
    assert sum(n.startswith("rotation") for n in fit.parameters) == 1
    # The relative turns come from the reference cell; the strained cell turns
    # the disk axes by ~1e-3 rad, which the fit absorbs at the 1e-6 level.
    np.testing.assert_allclose(fit.strain_voigt, green_lagrange_of(E_TRUE), atol=5e-6)
    assert any("tilts" in c for c in fit.constraints)


def test_tilts_that_miss_the_zone_are_refused(si):
    with pytest.raises(InputError, match="from the beam"):
        refine_patterns(si, _tilted_specs(si, spoil=5.0))
    specs = _tilted_specs(si)
    specs[1].tilt_deg = None
    with pytest.raises(InputError, match="every pattern"):
        refine_patterns(si, specs)
