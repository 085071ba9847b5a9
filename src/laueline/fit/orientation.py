"""Relative orientation of patterns from the holder's two tilt readings.

Convention (the holder frame):

* z points from the specimen toward the electron source (up the column,
  along every zone axis once it is aligned with the beam); x lies along the
  first tilt axis (the holder rod); y = z cross x.
* A reading (first, second) in degrees rotates the specimen by
  ``R = Rx(first) @ Ry(second)``: the second tilt axis is carried by the
  first (the cradle turns with the rod), so the second rotation is about
  the already tilted y axis.  Positive angles turn counter-clockwise seen
  from the positive end of the axis (right-hand rule).
* ``U`` is the crystal's orientation at zero tilt (crystal Cartesian frame
  -> holder frame).  Pattern j is recorded with its zone axis along z:
  ``R_j U b_j = z`` with b_j the unit vector along A [u v w].
* The camera does not turn between patterns: pixel offsets are
  ``scale R(theta0) M`` applied to the holder (x, y) components, and the
  disk frame of pattern j is turned by phi_j, the angle of its x axis
  ``R_j U x_j`` in the holder x-y plane.  Its detector rotation is therefore
  theta0 + phi_j (theta0 - phi_j with the mirror, since M R(phi) = R(-phi) M).

``U`` is the rotation that best brings every b_j onto R_j^T z (Wahba's
problem, solved by singular value decomposition, Markley 1988); a pattern
whose zone lands further than a tolerance from the beam is refused.

References
----------
Markley, F. L. (1988). Attitude determination using vector observations and
the singular value decomposition. J. Astronaut. Sci. 36, 245-258.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError
from ..frame import frame_rotations

__all__ = ["tilt_rotation", "orientation_from_tilts", "pattern_rotations_deg"]


def _about_x(deg):
    c, s = math.cos(math.radians(deg)), math.sin(math.radians(deg))
    return np.array([[1.0, 0.0, 0.0], [0.0, c, -s], [0.0, s, c]])


def _about_y(deg):
    c, s = math.cos(math.radians(deg)), math.sin(math.radians(deg))
    return np.array([[c, 0.0, s], [0.0, 1.0, 0.0], [-s, 0.0, c]])


def tilt_rotation(tilt_deg):
    """Rotation ``Rx(first) @ Ry(second)`` of a tilt reading (first, second) in degrees."""
    first, second = (float(v) for v in tilt_deg)
    return _about_x(first) @ _about_y(second)


def orientation_from_tilts(basis, zones, tilts_deg, *, tolerance_deg=1.0):
    """Crystal orientation at zero tilt from the zone axes seen at several readings.

    Parameters
    ----------
    basis : ndarray (3, 3)
        Reference direct basis.
    zones : sequence of (u, v, w)
    tilts_deg : sequence of (first, second)
    tolerance_deg : float
        Largest angle allowed between a zone axis, tilted by its reading,
        and the beam.

    Returns
    -------
    U : ndarray (3, 3)
        Crystal Cartesian -> holder frame at zero tilt.
    misfit_deg : ndarray (n,)
        Angle of each tilted zone axis from the beam.
    """
    if len(zones) < 2:
        raise InputError("tilt_deg: the tilt readings fix the relative orientation of "
                         "two or more patterns; give them for every pattern")
    b = np.array([basis @ np.asarray(z, float) for z in zones])
    b /= np.linalg.norm(b, axis=1, keepdims=True)
    rotations = [tilt_rotation(t) for t in tilts_deg]
    target = np.array([r.T @ [0.0, 0.0, 1.0] for r in rotations])
    # Wahba: U = argmin sum |target_j - U b_j|^2, by SVD (Markley 1988)
    u, _, vt = np.linalg.svd(target.T @ b)
    d = np.sign(np.linalg.det(u @ vt))
    U = u @ np.diag([1.0, 1.0, d]) @ vt
    beams = np.array([r @ U @ bj for r, bj in zip(rotations, b)])
    misfit = np.degrees(np.arccos(np.clip(beams[:, 2], -1.0, 1.0)))
    worst = int(np.argmax(misfit))
    if misfit[worst] > tolerance_deg:
        raise InputError(
            f"tilt_deg: pattern {worst + 1}'s tilts {list(tilts_deg[worst])} put zone "
            f"[{' '.join(map(str, zones[worst]))}] {misfit[worst]:.2f} deg from the beam "
            f"(tolerance {tolerance_deg:g} deg) given the other patterns' tilts")
    return U, misfit


def pattern_rotations_deg(basis, zones, x_axes, tilts_deg, U):
    """phi_j: angle (deg) of each pattern's disk x axis in the holder x-y plane."""
    out = []
    for zone, x_axis, tilt in zip(zones, x_axes, tilts_deg):
        x = frame_rotations(basis, zone, x_axis)[0]
        w = tilt_rotation(tilt) @ U @ x
        out.append(math.degrees(math.atan2(w[1], w[0])))
    return np.array(out)
