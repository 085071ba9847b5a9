"""Three- and four-index (Miller-Bravais) notation for hexagonal crystals.

Planes (h k i l) have i = -(h + k) and are the planes (h k l) of the
three-index hexagonal cell; directions [U V T W] with T = -(U + V) are the
directions [u v w] = [2U + V, 2V + U, W] of that cell (reduced to coprime
integers), and back [U V T W] = [(2u - v), (2v - u), -(u + v), 3w] / 3.

References
----------
Frank, F. C. (1965). On Miller-Bravais indices and four-dimensional vectors.
Acta Cryst. 18, 862-866.
"""

from __future__ import annotations

import math
from functools import reduce

import numpy as np

from ..errors import InputError

__all__ = ["is_hexagonal", "plane_from_four", "direction_from_four", "plane_to_four",
           "direction_to_four", "parse_plane", "parse_direction", "format_plane",
           "format_direction"]


def is_hexagonal(cell):
    """True for a cell with a = b, alpha = beta = 90 deg and gamma = 120 deg."""
    a, b, _, alpha, beta, gamma = (float(v) for v in cell)
    return (abs(a - b) < 1e-4 * a and abs(alpha - 90) < 1e-3 and abs(beta - 90) < 1e-3
            and abs(gamma - 120) < 1e-3)


def _integers(values, what, name):
    arr = np.asarray(values, dtype=float).ravel()
    if not np.all(np.isfinite(arr)) or np.any(arr != np.round(arr)):
        raise InputError(f"{name}: a {what} is made of integers, got {list(arr)}")
    return [int(v) for v in arr]


def plane_from_four(hkil, name="hkl"):
    """(h k l) of a four-index plane (h k i l); i must equal -(h + k)."""
    h, k, i, l = _integers(hkil, "plane (h k i l)", name)
    if i != -(h + k):
        raise InputError(f"{name}: ({h} {k} {i} {l}) breaks i = -(h + k) = {-(h + k)}")
    return (h, k, l)


def direction_from_four(uvtw, name="zone"):
    """[u v w] (coprime) of a four-index direction [U V T W]; T must equal -(U + V)."""
    U, V, T, W = _integers(uvtw, "direction [U V T W]", name)
    if T != -(U + V):
        raise InputError(f"{name}: [{U} {V} {T} {W}] breaks T = -(U + V) = {-(U + V)}")
    uvw = [2 * U + V, 2 * V + U, W]
    div = reduce(math.gcd, [abs(v) for v in uvw]) or 1
    return tuple(v // div for v in uvw)


def plane_to_four(hkl):
    h, k, l = (int(v) for v in hkl)
    return (h, k, -(h + k), l)


def direction_to_four(uvw):
    u, v, w = (int(x) for x in uvw)
    four = [2 * u - v, 2 * v - u, -(u + v), 3 * w]
    div = reduce(math.gcd, [abs(x) for x in four]) or 1
    return tuple(x // div for x in four)


def _parse(values, hexagonal, name, what, from_four):
    values = list(values)
    if len(values) == 4:
        if not hexagonal:
            raise InputError(f"{name}: four-index (Miller-Bravais) indices need a hexagonal "
                             "crystal")
        return from_four(values, name)
    if len(values) != 3:
        raise InputError(f"{name}: a {what} has three indices (four for hexagonal "
                         f"crystals), got {len(values)}")
    return tuple(_integers(values, what, name))


def parse_plane(values, hexagonal, name="hkl"):
    """Three indices, or four for a hexagonal crystal, to (h k l)."""
    return _parse(values, hexagonal, name, "reflection", plane_from_four)


def parse_direction(values, hexagonal, name="zone"):
    """Three indices, or four for a hexagonal crystal, to [u v w]."""
    return _parse(values, hexagonal, name, "zone axis", direction_from_four)


def format_plane(hkl, hexagonal=False):
    """'h k l', or 'h k i l' for a hexagonal crystal."""
    idx = plane_to_four(hkl) if hexagonal else tuple(int(v) for v in hkl)
    return " ".join(str(v) for v in idx)


def format_direction(uvw, hexagonal=False):
    idx = direction_to_four(uvw) if hexagonal else tuple(int(v) for v in uvw)
    return " ".join(str(v) for v in idx)
