"""A pattern renderer for the tests, written apart from laueline's renderer and detector.

What it draws, and why it is independent of what it tests:

* line positions: the exact loci of :mod:`laueline.lines` (the geometry is
  not under test), through :func:`laueline.lines.locus_distances`;
* the mapping from pixels to mrad: written out here from its definition
  (pixel = c + (I + E) s R M t, E = [[e1, e2], [e2, -e1]]), not taken from
  :class:`laueline.detector.Detector`;
* line profiles: a two-beam rocking curve, the diffracted intensity
  sin^2(pi T sqrt(1 + w^2)) / (1 + w^2) with w the deviation in units of
  the line's half width and T the thickness over the extinction distance
  (Hirsch, Howie, Nicholson, Pashley and Whelan, *Electron Microscopy of
  Thin Crystals*, 1965, ch. 8), made asymmetric by a factor 1 + beta tanh(w)
  as absorption and many-beam coupling do: dips with side fringes, neither
  Gaussian nor of the Gauss-Hermite family the detector fits;
* the disk: an elliptical soft edge (the distortion applied in mrad), a
  smooth radial and linear intensity variation and a broad soft band;
* the detector: a Gaussian point-spread function and Poisson counting.

The true position of each line is the minimum of its profile after the
point-spread function (a symmetric blur moves the minimum of an asymmetric
dip; that recorded minimum is what any detector can see), found on a fine
1-D grid, and drawn as the points of the exact locus shifted by that offset.
"""

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage
from scipy.special import erfc

from laueline.lines import line_parameters, locus_distances, predict


@dataclass
class PhysicalSettings:
    shape: tuple = (320, 320)
    scale_px_per_mrad: float | None = None
    center_px: tuple | None = None
    rotation_deg: float = 23.0
    mirror: bool = False
    distortion: tuple = (0.0, 0.0)
    width_mrad: float = 0.08          # half width of the rocking curve, mrad
    thickness_ratio: float = 0.7      # T = t / xi_g
    asymmetry: float = 0.35           # beta
    contrast: tuple = (0.03, 0.3)     # of the weakest and the strongest line drawn
    min_strength: float = 0.12
    band: float = 0.06                # relative height of a broad band across the disk
    psf_px: float = 0.7
    dose: float = 3000.0
    seed: int = 0
    extra_contrast: dict = field(default_factory=dict)   # hkl tuple -> contrast


def rocking_deficit(w, thickness_ratio, asymmetry):
    """Deficit profile of a line, peak 1 near w = 0 (w in half widths)."""
    q = np.sqrt(1.0 + w * w)
    return np.sin(np.pi * thickness_ratio * q) ** 2 / (q * q) * (1.0 + asymmetry * np.tanh(w))


def _profile_peak(thickness_ratio, asymmetry):
    w = np.linspace(-3, 3, 6001)
    return float(np.max(rocking_deficit(w, thickness_ratio, asymmetry)))


def pixel_matrix(scale, rotation_deg, mirror, distortion):
    """(I + E) s R M: mrad -> pixel offsets, written out from its definition."""
    a = math.radians(rotation_deg)
    rot = np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
    mir = np.diag([1.0, -1.0 if mirror else 1.0])
    e1, e2 = distortion
    return np.array([[1 + e1, e2], [e2, 1 - e1]]) @ (scale * rot @ mir)


def render_physical(crystal, zone, kv=200.0, disk_mrad=6.0, settings=None, *, x_axis=None,
                    strain=None):
    """Render a disk with physical line profiles; returns (image, truth).

    ``truth`` holds ``matrix`` (mrad -> px), ``center_px``, ``radius_px``,
    ``pattern`` (the laueline prediction used for the loci), and per line
    ``hkl``, ``contrast``, ``minima_px`` (true minima along the chord) and
    ``offset_px`` (minimum relative to the exact locus).
    """
    st = settings or PhysicalSettings()
    rows, cols = st.shape
    scale = st.scale_px_per_mrad or 0.4 * min(rows, cols) / disk_mrad
    centre = np.array(st.center_px if st.center_px is not None
                      else ((cols - 1) / 2 + 0.37, (rows - 1) / 2 - 0.21))
    mat = pixel_matrix(scale, st.rotation_deg, st.mirror, st.distortion)
    inv = np.linalg.inv(mat)
    pattern = predict(crystal, zone, kv, disk_mrad, x_axis=x_axis, strain=strain,
                      min_strength=st.min_strength)
    y, x = np.mgrid[0:rows, 0:cols].astype(float)
    t = (np.stack([x - centre[0], y - centre[1]], -1) @ inv.T)          # mrad
    r_mrad = np.hypot(t[..., 0], t[..., 1])
    edge_mrad = 0.9 / scale                                             # ~0.9 px soft edge
    disk = 0.5 * erfc((r_mrad - disk_mrad) / (math.sqrt(2) * edge_mrad))
    # smooth intensity: a radial dome, a linear tilt and a broad soft band
    u = r_mrad / disk_mrad
    level = 1.0 + 0.12 * (1 - u * u) + 0.1 * t[..., 0] / disk_mrad
    band_axis = (t[..., 0] * math.cos(0.7) + t[..., 1] * math.sin(0.7)) / disk_mrad
    level *= 1.0 + st.band * 0.5 * (erfc((np.abs(band_axis - 0.2) - 0.25) / 0.08))
    image = level * disk
    inside = r_mrad < disk_mrad * 1.05
    params = line_parameters(pattern.crystal.g_vectors(pattern.hkl), pattern.frame,
                             pattern.beam.wave_number)
    s_min, s_max = float(pattern.strength.min()), float(pattern.strength.max())
    lo, hi = st.contrast
    contrast = lo + (hi - lo) * (pattern.strength - s_min) / max(s_max - s_min, 1e-12)
    for k, h in enumerate(pattern.hkl.tolist()):
        contrast[k] = st.extra_contrast.get(tuple(h), contrast[k])
    peak = _profile_peak(st.thickness_ratio, st.asymmetry)
    tin = t[inside] * 1e-3
    factor = np.ones(len(tin))
    for i in range(pattern.n_lines):  # one line at a time keeps memory at one image
        sub = type(params)(params.g_perp[i:i + 1], params.g_perp_norm[i:i + 1],
                           params.gz[i:i + 1], params.c[i:i + 1])
        dist = locus_distances(tin[None], sub)[0] * 1e3                  # mrad
        near = np.abs(dist) < 12 * st.width_mrad
        w = dist[near] / st.width_mrad
        factor[near] *= 1.0 - contrast[i] * rocking_deficit(w, st.thickness_ratio,
                                                            st.asymmetry) / peak
    image[inside] *= factor
    image = 0.04 + image
    if st.psf_px > 0:
        image = ndimage.gaussian_filter(image, st.psf_px, mode="nearest")
    rng = np.random.default_rng(st.seed)
    if st.dose > 0:
        image = rng.poisson(image * st.dose).astype(float)
    # true minima: the profile across the line after the point-spread function
    step = 0.005
    xs = np.arange(-40, 40 + step / 2, step)                             # px along the normal
    lines = []
    for i in range(pattern.n_lines):
        n_mrad = pattern.normal[i]
        px_per_mrad = float(np.linalg.norm(mat @ n_mrad))
        prof = rocking_deficit(xs / (st.width_mrad * px_per_mrad), st.thickness_ratio,
                               st.asymmetry)
        if st.psf_px > 0:
            prof = ndimage.gaussian_filter1d(prof, st.psf_px / step)
        j = int(np.argmax(prof))
        a, b, c = prof[j - 1], prof[j], prof[j + 1]
        x_min = xs[j] + 0.5 * step * (a - c) / (a - 2 * b + c)
        shifted = pattern.points_mrad[i] + (x_min / px_per_mrad) * n_mrad
        lines.append({"hkl": tuple(int(v) for v in pattern.hkl[i]),
                      "contrast": float(contrast[i]), "offset_px": float(x_min),
                      "minima_px": centre + shifted @ mat.T})
    truth = {"matrix": mat, "center_px": centre, "radius_px": disk_mrad * scale,
             "scale_px_per_mrad": scale, "pattern": pattern, "lines": lines,
             "distortion": tuple(st.distortion)}
    return image, truth
