"""Mapping between disk points in mrad and detector pixels.

    pixel = centre + (I + E) @ (scale * R(rotation) @ M @ t_mrad)

with R the counter-clockwise rotation by ``rotation_deg`` in pixel
coordinates, M the identity or the mirror diag(1, -1) (DESIGN.md), and E the
optional projector distortion E = [[e1, e2], [e2, -e1]] in pixel axes: a
trace-free symmetric (elliptical) term, so that it never trades against the
scale.  A circle of radius r mrad maps to an ellipse with semi-axes
scale * r * (1 +- sqrt(e1^2 + e2^2)); e1 = e2 = 0 (the default) is a plain
similarity.

Pixel convention, used for point files and images alike: x is the column
index growing to the right, y the row index growing downward, both measured
from the centre of the first pixel (so an image array ``img[row, col]`` has
its pixel (x, y) at ``img[y, x]``).  Because y points down, the identity
mapping shows the disk frame mirrored with respect to a view from the
source; the mirror flag and the rotation absorb whatever the microscope and
camera add.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

__all__ = ["Detector", "rotation_matrix"]


def rotation_matrix(rotation_deg):
    a = math.radians(rotation_deg)
    return np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])


@dataclass(frozen=True)
class Detector:
    """Detector geometry.

    Attributes
    ----------
    center_px : tuple of float
        Pixel position (x, y) of the zone-axis direction t = 0.
    scale_px_per_mrad : float
    rotation_deg : float
    mirror : bool
    distortion : tuple of float
        (e1, e2) of the elliptical projector distortion (dimensionless).
    """

    center_px: tuple = (0.0, 0.0)
    scale_px_per_mrad: float = 1.0
    rotation_deg: float = 0.0
    mirror: bool = False
    distortion: tuple = (0.0, 0.0)

    @property
    def distortion_matrix(self):
        """The 2x2 matrix I + E of the projector distortion."""
        e1, e2 = (float(v) for v in self.distortion)
        return np.array([[1.0 + e1, e2], [e2, 1.0 - e1]])

    @property
    def matrix(self):
        """The 2x2 matrix (I + E) scale R @ M mapping mrad to pixel offsets."""
        m = np.diag([1.0, -1.0 if self.mirror else 1.0])
        similarity = self.scale_px_per_mrad * rotation_matrix(self.rotation_deg) @ m
        if self.distortion[0] == 0.0 and self.distortion[1] == 0.0:
            return similarity
        return self.distortion_matrix @ similarity

    def to_pixels(self, t_mrad):
        """Pixels (x, y) of disk points (..., 2) in mrad."""
        return np.asarray(t_mrad) @ self.matrix.T + np.asarray(self.center_px)

    def to_mrad(self, px):
        """Disk points in mrad of pixels (..., 2)."""
        return (np.asarray(px) - np.asarray(self.center_px)) @ np.linalg.inv(self.matrix).T

    def replace(self, **changes):
        return replace(self, **changes)

    def as_dict(self):
        return {"center_px": [float(v) for v in self.center_px],
                "scale_px_per_mrad": float(self.scale_px_per_mrad),
                "rotation_deg": float(self.rotation_deg), "mirror": bool(self.mirror),
                "distortion": [float(v) for v in self.distortion]}
