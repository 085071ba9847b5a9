"""The zone-axis frame of the central disk.

Conventions (DESIGN.md):

* The zone axis [u v w] points from the specimen toward the electron source,
  antiparallel to the beam; the unit vector ``B`` is along ``A @ [u v w]``.
* ``x`` is the unit vector along the reciprocal vector of the reflection
  ``x_axis = (h k l)``, which must satisfy hu + kv + lw = 0 (so it is normal
  to B already); ``y = B x x``.  (x, y, B) is right-handed: the view from the
  source looking down the beam.
* A disk point (tx, ty) in mrad is the tangential part of the incident wave
  vector divided by K, times 1000:
  ``K_in = K (tx x + ty y - sqrt(1 - t^2) B)`` with t in radians.

The frame is always built from the basis being predicted, so a rigid
rotation of a crystal rotates the frame with it and the pattern is
unchanged.

When no x axis is given, :func:`default_x_axis` takes the shortest
reciprocal vector of the zero-order Laue zone that is neither systematically
absent nor kinematically zero (such as 222 in silicon); ties are broken by
the largest h, then k, then l.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import reduce

import numpy as np

from .errors import InputError

__all__ = ["ZoneFrame", "zone_frame", "frame_rotations", "default_x_axis", "reduce_indices",
           "incident_wavevectors"]


def reduce_indices(indices, what="zone axis"):
    """Integer triple divided by its greatest common divisor.

    Returns
    -------
    reduced : tuple of int
    factor : int
        The common divisor that was removed (1 when already primitive).
    """
    arr = np.asarray(indices, dtype=float).ravel()
    if arr.size != 3 or not np.all(np.isfinite(arr)) or np.any(arr != np.round(arr)):
        raise InputError(f"a {what} is three integers, got {list(np.ravel(indices))}")
    ints = [int(v) for v in arr]
    if ints == [0, 0, 0]:
        raise InputError(f"the {what} [0 0 0] has no direction")
    div = reduce(math.gcd, [abs(v) for v in ints])
    return tuple(v // div for v in ints), div


@dataclass(frozen=True)
class ZoneFrame:
    """Orthonormal disk frame (x, y, B) in the crystal's Cartesian frame.

    Attributes
    ----------
    zone : tuple of int
        Zone axis [u v w], reduced to coprime indices.
    x_axis : tuple of int
        Reflection (h k l) that fixes the x direction.
    rotation : ndarray, shape (3, 3)
        Rows x, y, B; ``rotation @ v`` gives frame components of a Cartesian v.
    layer_spacing : float
        Spacing H of the reciprocal-lattice layers normal to the zone axis,
        1 / |A [u v w]| in 1/angstrom; layer n lies at height n H along B.
    x_axis_chosen : bool
        True when the x axis was chosen by :func:`default_x_axis`.
    """

    zone: tuple
    x_axis: tuple
    rotation: np.ndarray
    layer_spacing: float
    x_axis_chosen: bool = False

    @property
    def beam_direction(self):
        """Unit vector B (toward the source)."""
        return self.rotation[2]

    def components(self, vectors):
        """Frame components (x, y, B) of Cartesian vectors, shape (..., 3)."""
        return np.asarray(vectors) @ self.rotation.T


def zone_frame(basis, zone, x_axis, *, chosen=False):
    """Build the disk frame from a direct basis matrix.

    Parameters
    ----------
    basis : ndarray, shape (3, 3)
        Direct basis matrix A (columns a, b, c), angstrom.
    zone : sequence of 3 int
        Zone axis [u v w] toward the source.
    x_axis : sequence of 3 int
        Reflection (h k l) with hu + kv + lw = 0.
    chosen : bool
        Recorded in the frame: whether ``x_axis`` was chosen automatically.
    """
    zone, _ = reduce_indices(zone)
    hkl = np.asarray(x_axis, dtype=float).ravel()
    if hkl.size != 3 or np.any(hkl != np.round(hkl)):
        raise InputError(f"the x axis is three integers, got {list(np.ravel(x_axis))}")
    hkl_int = tuple(int(v) for v in hkl)
    if hkl_int == (0, 0, 0):
        raise InputError("the x axis (0 0 0) has no direction")
    dot = int(np.dot(hkl_int, zone))
    if dot != 0:
        raise InputError(
            f"the x axis ({' '.join(map(str, hkl_int))}) is not normal to the zone "
            f"[{' '.join(map(str, zone))}]: hu+kv+lw = {dot}, it must be 0")
    basis = np.asarray(basis, dtype=float)
    direct = basis @ np.asarray(zone, dtype=float)
    return ZoneFrame(zone=zone, x_axis=hkl_int, rotation=frame_rotations(basis, zone, hkl_int),
                     layer_spacing=1.0 / float(np.linalg.norm(direct)),
                     x_axis_chosen=chosen)


def frame_rotations(bases, zone, x_axis):
    """Rows (x, y, B) of the disk frame for one basis (3, 3) or a stack (..., 3, 3).

    No validation: :func:`zone_frame` checks the indices.
    """
    bases = np.asarray(bases, dtype=float)
    direct = bases @ np.asarray(zone, dtype=float)
    beam = direct / np.linalg.norm(direct, axis=-1, keepdims=True)
    g = np.swapaxes(np.linalg.inv(bases), -1, -2) @ np.asarray(x_axis, dtype=float)
    x = g - np.sum(g * beam, axis=-1, keepdims=True) * beam  # zero up to rounding
    x /= np.linalg.norm(x, axis=-1, keepdims=True)
    return np.stack([x, np.cross(beam, x), beam], axis=-2)


def default_x_axis(crystal, zone):
    """Shortest visible zero-layer reflection of ``zone``, ties by largest h, k, l.

    Visible: not systematically absent and with a kinematic structure factor
    above 1e-6 of the largest among the candidates.
    """
    zone, _ = reduce_indices(zone)
    for reach in (6, 12, 24):
        r = np.arange(-reach, reach + 1)
        hkl = np.stack(np.meshgrid(r, r, r, indexing="ij"), axis=-1).reshape(-1, 3)
        hkl = hkl[(hkl @ np.asarray(zone) == 0) & np.any(hkl != 0, axis=1)]
        hkl = hkl[~crystal.is_absent(hkl)]
        if len(hkl):
            f_abs = np.abs(crystal.structure_factors(hkl))
            hkl = hkl[f_abs > 1e-6 * f_abs.max()]
            length = np.linalg.norm(crystal.g_vectors(hkl), axis=1)
            shortest = length <= length.min() * (1 + 1e-9)
            best = hkl[shortest]
            order = np.lexsort((-best[:, 2], -best[:, 1], -best[:, 0]))
            return tuple(int(v) for v in best[order[0]])
    raise InputError(f"no zero-layer reflection found for zone {list(zone)}")


def incident_wavevectors(t_mrad, frame, wave_number):
    """Incident wave vectors (Cartesian, 1/angstrom) for disk points in mrad.

    ``K_in = K (tx x + ty y - sqrt(1 - t^2) B)`` with t = t_mrad / 1000.
    """
    t = np.asarray(t_mrad, dtype=float) * 1e-3
    tz = -np.sqrt(1.0 - np.sum(t ** 2, axis=-1, keepdims=True))
    local = np.concatenate([t, tz], axis=-1)
    return wave_number * local @ frame.rotation
