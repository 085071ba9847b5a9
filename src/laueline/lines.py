"""HOLZ deficit lines in the central disk: the one forward model of laueline.

Geometry (conventions of DESIGN.md and :mod:`laueline.frame`).  Write a
reciprocal vector in the disk frame as g = gx x + gy y + gz B, with
gz = n H for Laue zone n and layer spacing H, and let G = |(gx, gy)|,
n_hat = (gx, gy) / G and c = |g|^2 / (2 K).  The deficit line of g is the
set of disk points t (radians) where the Bragg condition
2 K_in.g + |g|^2 = 0 holds for K_in = K (t - sqrt(1 - t^2) B):

    G (t . n_hat) + c = gz sqrt(1 - |t|^2).

In the coordinates p = t . n_hat (across the line) and q (along it, with
(-n_hat_y, n_hat_x) as positive direction) the locus is an ellipse, and the
branch facing the source is, without cancellation,

    p(q) = (gz^2 (1 - q^2) - c^2) / (G c + gz sqrt((G^2 + gz^2)(1 - q^2) - c^2)).

Zero-layer lines (gz = 0) are exactly straight, p = -c / G.  The
straight-line approximation drops the square root's curvature:
t . n_hat = (gz - c) / G; it is reported for every line but never used for
positions.  Crossings of two lines are found by Newton's method on the two
exact loci, started from the intersection of their straight-line forms.

Line strength is |F_g| divided by the largest |F_g| among the HOLZ (n >= 1)
lines whose loci enter the disk (DESIGN.md); structure factors are those of
:meth:`laueline.crystal.Crystal.structure_factors`, in angstrom.

References
----------
Jones, P. M., Rackham, G. M. and Steeds, J. W. (1977). Higher order Laue
zone effects in electron diffraction and their use in lattice parameter
determination. Proc. R. Soc. Lond. A 354, 197-222.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .crystal import MAX_REFLECTIONS, Crystal
from .errors import InputError
from .limits import MAX_LINES, check_inputs
from .frame import ZoneFrame, default_x_axis, frame_rotations, reduce_indices, zone_frame
from .optics import Beam, make_beam
from .results import ResultMixin, format_indices

__all__ = [
    "Pattern",
    "predict",
    "line_parameters",
    "locus_offset",
    "locus_residual",
    "locus_distances",
    "locus_samples",
    "line_parameters_batch",
    "crossing_positions",
    "crossing_angles_deg",
    "enumerate_reflections",
    "ring_radius_mrad",
]

_MIN_G_PERP = 1e-9      # 1/angstrom: reflections along the beam draw no line
_NEWTON_STEPS = 4  # quadratic convergence from a start within ~1e-6 rad


# ---------------------------------------------------------------------------
# line geometry, vectorised over reflections
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class LineParameters:
    """Frame quantities of a set of reflections (arrays of shape (n,) or (n, 2)).

    g_perp is the in-plane part (1/angstrom), g_perp_norm its length G,
    gz the height along B, c = |g|^2 / (2K), normal the unit vector of g_perp.
    """

    g_perp: np.ndarray
    g_perp_norm: np.ndarray
    gz: np.ndarray
    c: np.ndarray

    @property
    def normal(self):
        return self.g_perp / self.g_perp_norm[..., None]

    @property
    def straight_offset(self):
        """Offset of the straight-line approximation, radians."""
        return (self.gz - self.c) / self.g_perp_norm


def _parameters_from_components(g, wave_number):
    """LineParameters from frame components g (..., 3) and K (scalar or (...,))."""
    g_perp = g[..., :2]
    norm = np.hypot(g_perp[..., 0], g_perp[..., 1])
    k = np.asarray(wave_number, dtype=float)
    if k.ndim:
        k = k.reshape(k.shape + (1,) * (g.ndim - 1 - k.ndim))
    c = np.sum(g * g, axis=-1) / (2.0 * k)
    return LineParameters(g_perp, norm, g[..., 2], c)


def line_parameters(g_cartesian, frame, wave_number):
    """Frame quantities of reciprocal vectors for the deficit-line equations.

    Parameters
    ----------
    g_cartesian : ndarray, shape (n, 3)
        Reciprocal vectors in the crystal's Cartesian frame, 1/angstrom.
    frame : ZoneFrame
    wave_number : float
        K in 1/angstrom.
    """
    g = frame.components(np.asarray(g_cartesian, dtype=float))
    return _parameters_from_components(g, wave_number)


def locus_offset(params, q=0.0):
    """Exact across-line coordinate p(q) of the locus, radians.

    Parameters
    ----------
    params : LineParameters
    q : float or ndarray broadcastable to (n,) or (n, m)
        Along-line coordinate in radians.
    """
    q = np.asarray(q, dtype=float)
    extra = (slice(None),) + (None,) * max(q.ndim - 1, 0)
    G = params.g_perp_norm[extra]
    gz = params.gz[extra]
    c = params.c[extra]
    one_minus_q2 = 1.0 - q * q
    root = np.sqrt(np.maximum((G * G + gz * gz) * one_minus_q2 - c * c, 0.0))
    return (gz * gz * one_minus_q2 - c * c) / (G * c + gz * root)


def locus_residual(t_rad, params):
    """Bragg-condition residual of points for each line, scaled to radians.

    ``(t . g_perp - sqrt(1 - t^2) gz + c) / G``: zero on the locus, positive
    on the side the normal points to, and equal to the distance from the
    locus to first order.

    Parameters
    ----------
    t_rad : ndarray, shape (n, 2) or (n, m, 2)
        Disk points in radians, one set per line.
    params : LineParameters
    """
    t = np.asarray(t_rad, dtype=float)
    extra = (slice(None),) + (None,) * (t.ndim - 2)
    along = np.sum(t * params.g_perp[extra + (slice(None),)], axis=-1)
    axial = np.sqrt(1.0 - np.sum(t * t, axis=-1))
    return (along - axial * params.gz[extra] + params.c[extra]) / params.g_perp_norm[extra]


def locus_distances(t_rad, params):
    """Signed distances (radians, first order) of points from the exact loci.

    The Bragg-condition residual divided by the length of its gradient: the
    distance from the locus up to terms of the order of distance^2 times
    the locus curvature (~ gz / G), far below a pixel for points near a line.

    Parameters
    ----------
    t_rad : ndarray, shape (..., k, 2)
        Points; the leading dimensions match those of ``params``.
    params : LineParameters
        Arrays of shape (...,).
    """
    t = np.asarray(t_rad, dtype=float)
    g_perp = params.g_perp[..., None, :]
    gz = params.gz[..., None]
    c = params.c[..., None]
    axial = np.sqrt(1.0 - np.sum(t * t, axis=-1))
    value = np.sum(t * g_perp, axis=-1) - axial * gz + c
    grad = g_perp + (gz / axial)[..., None] * t
    return value / np.linalg.norm(grad, axis=-1)


def _chord_half_length(params, radius):
    """Half-length (radians) of each locus inside a disk of the given radius."""
    p0 = locus_offset(params)
    q = np.sqrt(np.maximum(radius ** 2 - p0 ** 2, 0.0))
    for _ in range(5):  # contraction factor ~ |p gz / G| << 1
        p = locus_offset(params, q)
        q = np.sqrt(np.maximum(radius ** 2 - p ** 2, 0.0))
    return q


def _locus_points(params, radius, n_points):
    half = _chord_half_length(params, radius)
    q = np.linspace(-1.0, 1.0, n_points)[None, :] * half[:, None]
    p = locus_offset(params, q)
    normal = params.normal
    along = np.stack([-normal[:, 1], normal[:, 0]], axis=1)
    return p[..., None] * normal[:, None, :] + q[..., None] * along[:, None, :]


def locus_samples(params, radius, fractions):
    """Points on the exact loci inside a disk, with the unit normals there.

    Parameters
    ----------
    params : LineParameters
        Arrays of shape (n,).
    radius : float
        Disk radius in radians.
    fractions : array_like, shape (m,) or (n, m)
        Positions along each chord as fractions of its half-length, in [-1, 1]
        (0 is the point of the locus nearest the disk centre).

    Returns
    -------
    points : ndarray, shape (n, m, 2)
        Disk points in radians.
    normals : ndarray, shape (n, m, 2)
        Unit normals of the loci at those points, along the gradient of the
        Bragg-condition residual (:func:`locus_residual` grows along them).
    half_length : ndarray, shape (n,)
        Half-length of each chord in radians.
    """
    half = _chord_half_length(params, radius)
    f = np.broadcast_to(np.asarray(fractions, dtype=float), (len(half), np.shape(fractions)[-1]))
    q = f * half[:, None]
    p = locus_offset(params, q)
    normal = params.normal
    along = np.stack([-normal[:, 1], normal[:, 0]], axis=1)
    points = p[..., None] * normal[:, None, :] + q[..., None] * along[:, None, :]
    axial = np.sqrt(1.0 - np.sum(points * points, axis=-1))
    grad = params.g_perp[:, None, :] + (params.gz[:, None] / axial)[..., None] * points
    return points, grad / np.linalg.norm(grad, axis=-1, keepdims=True), half


def _straight_intersections(pa, pb):
    na, nb = pa.normal, pb.normal
    da, db = pa.straight_offset, pb.straight_offset
    det = na[..., 0] * nb[..., 1] - na[..., 1] * nb[..., 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.stack([(da * nb[..., 1] - db * na[..., 1]) / det,
                         (na[..., 0] * db - nb[..., 0] * da) / det], axis=-1)


def _solve_crossings(pa, pb, guess=None):
    """Newton's method on two exact loci per pair; returns points in radians.

    Arrays of ``pa`` and ``pb`` may carry leading batch dimensions.
    """
    t = _straight_intersections(pa, pb) if guess is None else np.array(guess, dtype=float)
    ga, gb = pa.g_perp / pa.g_perp_norm[..., None], pb.g_perp / pb.g_perp_norm[..., None]
    za, zb = pa.gz / pa.g_perp_norm, pb.gz / pb.g_perp_norm
    ca, cb = pa.c / pa.g_perp_norm, pb.c / pb.g_perp_norm
    for _ in range(_NEWTON_STEPS):
        tx, ty = t[..., 0], t[..., 1]
        axial = np.sqrt(1.0 - tx * tx - ty * ty)
        fa = tx * ga[..., 0] + ty * ga[..., 1] - axial * za + ca
        fb = tx * gb[..., 0] + ty * gb[..., 1] - axial * zb + cb
        sa, sb = za / axial, zb / axial
        ja0, ja1 = ga[..., 0] + sa * tx, ga[..., 1] + sa * ty
        jb0, jb1 = gb[..., 0] + sb * tx, gb[..., 1] + sb * ty
        det = ja0 * jb1 - ja1 * jb0
        t = np.stack([tx - (fa * jb1 - fb * ja1) / det,
                      ty - (ja0 * fb - jb0 * fa) / det], axis=-1)
    return t


def _gradient_angles_deg(pa, pb, t):
    axial = np.sqrt(1.0 - np.sum(t * t, axis=-1))
    ja = pa.g_perp + (pa.gz / axial)[..., None] * t
    jb = pb.g_perp + (pb.gz / axial)[..., None] * t
    cross = np.abs(ja[..., 0] * jb[..., 1] - ja[..., 1] * jb[..., 0])
    dot = np.abs(np.sum(ja * jb, axis=-1))
    return np.degrees(np.arctan2(cross, dot))


def _pair_parameters(bases, zone, x_axis, wave_number, hkl_a, hkl_b):
    """Line parameters of both lines of each pair, for one basis or a stack."""
    zone, _ = reduce_indices(zone)
    x_axis = tuple(int(v) for v in np.ravel(x_axis))
    if int(np.dot(x_axis, zone)) != 0:
        raise InputError(f"the x axis {x_axis} is not normal to the zone {list(zone)}")
    bases = np.asarray(bases, dtype=float)
    recip = np.swapaxes(np.linalg.inv(bases), -1, -2)  # A* = A^-T
    to_frame = frame_rotations(bases, zone, x_axis) @ recip  # frame components of A* h
    ga = np.asarray(hkl_a, dtype=float) @ np.swapaxes(to_frame, -1, -2)
    gb = np.asarray(hkl_b, dtype=float) @ np.swapaxes(to_frame, -1, -2)
    return (_parameters_from_components(ga, wave_number),
            _parameters_from_components(gb, wave_number))


def line_parameters_batch(bases, zone, x_axis, wave_number, hkl):
    """Line parameters of reflections ``hkl`` (n, 3) for one basis or a stack (m, 3, 3)."""
    return _pair_parameters(bases, zone, x_axis, wave_number, hkl, hkl[:0])[0]


def crossing_positions(basis, zone, x_axis, wave_number, hkl_a, hkl_b, guess_mrad=None):
    """Exact crossing points of pairs of deficit lines, in mrad.

    This is the entry point refinement and survey use: the frame is rebuilt
    from ``basis`` each call, so a strained or rotated basis is handled
    consistently with :func:`predict`.  A stack of bases (with one wave
    number each) is evaluated in one vectorised pass, which is how
    refinement forms its Jacobian.

    Parameters
    ----------
    basis : ndarray, shape (3, 3) or (m, 3, 3)
        Direct basis matrix A, angstrom, or a stack of them.
    zone, x_axis : sequence of 3 int
        Zone axis and x-axis reflection (see :mod:`laueline.frame`).
    wave_number : float or ndarray, shape (m,)
        K in 1/angstrom.
    hkl_a, hkl_b : array_like, shape (p, 3)
        The two reflections of each crossing.
    guess_mrad : array_like, shape (p, 2), optional
        Starting points; by default the straight-line intersections.

    Returns
    -------
    ndarray, shape (p, 2) or (m, p, 2)
        Crossing positions (tx, ty) in mrad; NaN where the lines are parallel.
    """
    pa, pb = _pair_parameters(basis, zone, x_axis, wave_number, hkl_a, hkl_b)
    guess = None if guess_mrad is None else np.asarray(guess_mrad, dtype=float) * 1e-3
    with np.errstate(divide="ignore", invalid="ignore"):
        return _solve_crossings(pa, pb, guess) * 1e3


def crossing_angles_deg(basis, zone, x_axis, wave_number, hkl_a, hkl_b, t_mrad):
    """Angle (0-90 deg) between the two exact loci at each crossing point."""
    pa, pb = _pair_parameters(basis, zone, x_axis, wave_number, hkl_a, hkl_b)
    return _gradient_angles_deg(pa, pb, np.asarray(t_mrad, dtype=float) * 1e-3)


def ring_radius_mrad(layer, layer_spacing, wave_number):
    """Angular radius (mrad) of the HOLZ ring of layer n at exact zone-axis incidence.

    Reflections of layer n satisfying the Bragg condition at t = 0 have
    in-plane length G_n = sqrt(2 K n H - (n H)^2); the diffracted beam leaves
    at asin(G_n / K) from the zone axis.  Jones, Rackham and Steeds (1977)
    give the approximation G_n = sqrt(2 K n H).
    """
    nh = np.asarray(layer, dtype=float) * layer_spacing
    return 1e3 * np.arcsin(np.sqrt(2.0 * wave_number * nh - nh * nh) / wave_number)


# ---------------------------------------------------------------------------
# enumeration and the Pattern
# ---------------------------------------------------------------------------

def enumerate_reflections(basis, zone, gmax, *, near_disk=None):
    """All (h k l) with 0 < |g| <= gmax and hu + kv + lw >= 0.

    Parameters
    ----------
    basis : ndarray, shape (3, 3)
        Direct basis matrix, angstrom.
    zone : sequence of 3 int
    gmax : float
        1/angstrom.
    near_disk : (wave_number, radius_rad), optional
        Keep only the zero layer and the reflections whose deficit line can
        reach a disk of this radius.  A line entering the disk satisfies
        |gz - |g|^2 / 2K| <= |g| (alpha + alpha^2) (from the locus equation
        at its point nearest the centre), which is tested on the index grid
        before any vector is formed.

    Returns
    -------
    hkl : ndarray of int, shape (n, 3)
    g : ndarray, shape (n, 3)
        Cartesian reciprocal vectors, 1/angstrom.

    Raises
    ------
    InputError
        When the index box would exceed :data:`laueline.crystal.MAX_REFLECTIONS`.
    """
    gmax = float(gmax)
    if not math.isfinite(gmax) or gmax <= 0:
        raise InputError(f"gmax must be positive, got {gmax:g} 1/A")
    basis = np.asarray(basis, dtype=float)
    lengths = np.linalg.norm(basis, axis=0)
    reach = np.floor(gmax * lengths).astype(np.int64)
    count = int(np.prod(2 * reach + 1))
    if count > MAX_REFLECTIONS:
        raise InputError(
            f"gmax {gmax:g} 1/A would enumerate {count:.3g} index triples, above the "
            f"limit of {MAX_REFLECTIONS:.0e}; use a smaller --gmax")
    h = np.arange(-reach[0], reach[0] + 1)[:, None, None]
    k = np.arange(-reach[1], reach[1] + 1)[None, :, None]
    l = np.arange(-reach[2], reach[2] + 1)[None, None, :]
    recip = np.linalg.inv(basis).T
    m = recip.T @ recip  # reciprocal metric tensor
    g2 = (m[0, 0] * h * h + m[1, 1] * k * k + m[2, 2] * l * l
          + 2 * (m[0, 1] * h * k + m[0, 2] * h * l + m[1, 2] * k * l))
    u, v, w = (int(x) for x in zone)
    layer = u * h + v * k + w * l
    mask = (g2 <= gmax * gmax) & (g2 > 0) & (layer >= 0)
    if near_disk is not None:
        wave_number, radius = near_disk
        spacing = 1.0 / np.linalg.norm(basis @ np.array([u, v, w], dtype=float))
        gap = np.abs(layer * spacing - g2 / (2.0 * wave_number))
        mask &= (layer == 0) | (gap <= gmax * (radius + radius ** 2) * (1 + 1e-6))
    ih, ik, il = np.nonzero(mask)
    hkl = np.stack([ih - reach[0], ik - reach[1], il - reach[2]], axis=1)
    return hkl, hkl @ recip.T


@dataclass(repr=False)
class Pattern(ResultMixin):
    """Predicted deficit lines and crossings of one central disk.

    Arrays have one row per line (``hkl`` ... ``points_mrad``) or per
    crossing (``crossing_*``).  ``crossing_lines`` indexes the line arrays.

    In a notebook: ``repr`` is a one-line summary, :meth:`to_dict` the
    ``laueline.pattern/1`` document of ``laueline predict --json``,
    ``to_dataframe("lines")`` / ``to_dataframe("crossings")`` the CSV tables
    as pandas DataFrames, and :meth:`plot` the figure of ``--figure``.
    """

    crystal: Crystal
    beam: Beam
    disk_mrad: float
    frame: ZoneFrame
    strain: np.ndarray | None
    gmax: float
    hkl: np.ndarray
    laue_zone: np.ndarray
    g_inv_A: np.ndarray
    f_abs: np.ndarray
    strength: np.ndarray
    normal: np.ndarray
    offset_mrad: np.ndarray
    points_mrad: np.ndarray
    crossing_lines: np.ndarray
    crossing_mrad: np.ndarray
    crossing_angle_deg: np.ndarray
    ring_layers: np.ndarray
    ring_radius_mrad: np.ndarray
    max_convergence_mrad: float
    overlap_hkl: tuple
    zero_layer_hkl: np.ndarray
    zero_layer_mrad: np.ndarray
    warnings: list = field(default_factory=list)

    @property
    def zone(self):
        return self.frame.zone

    @property
    def x_axis(self):
        return self.frame.x_axis

    @property
    def n_lines(self):
        return len(self.hkl)

    @property
    def n_crossings(self):
        return len(self.crossing_lines)

    def crossing_hkl(self):
        """(hkl_a, hkl_b), each of shape (p, 3), for the crossings."""
        return self.hkl[self.crossing_lines[:, 0]], self.hkl[self.crossing_lines[:, 1]]

    def _summary(self):
        n_holz = int(np.sum(self.laue_zone >= 1))
        strained = ", strained" if self.strain is not None else ""
        return (f"{self.crystal.name} [{format_indices(self.zone)}]{strained}, "
                f"{self.beam.kv:g} kV, disk {self.disk_mrad:g} mrad, x along "
                f"({format_indices(self.x_axis)}): {self.n_lines} lines ({n_holz} HOLZ), "
                f"{self.n_crossings} crossings")

    def _document(self):
        from .report import pattern_document

        return pattern_document(self)

    def _tables(self):
        from .report import pattern_tables

        (lh, lr), (ch, cr) = pattern_tables(self)
        return {"lines": (lh, lr), "crossings": (ch, cr)}

    def _figure(self, **kwargs):
        from .plot import pattern_figure

        return pattern_figure(self, **kwargs)


def predict(crystal, zone, kv=200.0, disk_mrad=6.0, *, x_axis=None, gmax=4.0,
            min_strength=0.05, min_angle_deg=5.0, strain=None, inner_potential=False,
            n_points=64, wave_number=None):
    """Predict the deficit lines and crossings in the central disk.

    Parameters
    ----------
    crystal : Crystal
    zone : sequence of 3 int
        Zone axis [u v w], toward the source.
    kv : float
        Accelerating voltage in kV.
    disk_mrad : float
        Convergence semi-angle, the radius of the central disk in mrad.
    x_axis : sequence of 3 int, optional
        Reflection fixing the disk x direction; chosen when omitted.
    gmax : float
        Largest |g| enumerated, 1/angstrom.
    min_strength : float
        Lines with relative strength below this are dropped.
    min_angle_deg : float
        Crossings of lines meeting at a smaller angle are not reported.
    strain : array_like, optional
        Six components (exx eyy ezz eyz exz exy) or 3x3; the crystal is
        predicted with basis (I + e) A.
    inner_potential : bool
        Correct the wave number for the mean inner potential.
    n_points : int
        Points per locus polyline (at least 50).
    wave_number : float, optional
        Override K (1/angstrom), for example an effective value from a fit.

    Returns
    -------
    Pattern
    """
    check_inputs(min_strength=min_strength, min_angle_deg=min_angle_deg)
    disk_mrad = float(disk_mrad)
    if not math.isfinite(disk_mrad) or disk_mrad <= 0:
        raise InputError(f"the disk radius must be positive, got {disk_mrad:g} mrad")
    if disk_mrad >= 200:
        raise InputError(f"a disk of {disk_mrad:g} mrad is beyond any CBED convergence "
                         "angle; give the semi-angle in mrad")
    if not 0 <= min_angle_deg < 90:
        raise InputError(f"the minimum crossing angle must be in [0, 90) deg, got {min_angle_deg:g}")
    if n_points < 50:
        raise InputError("a locus needs at least 50 points")
    warnings = list(crystal.notes)
    strain_tensor = None
    if strain is not None:
        from .crystal import strain_tensor as _as_tensor

        strain_tensor = _as_tensor(strain)
        crystal = crystal.strained(strain_tensor)
    beam = make_beam(kv, crystal, inner_potential)
    K = beam.wave_number if wave_number is None else float(wave_number)
    zone_reduced, factor = reduce_indices(zone)
    if factor != 1:
        warnings.append(f"zone axis {list(map(int, np.ravel(zone)))} reduced to "
                        f"{list(zone_reduced)}")
    chosen = x_axis is None
    if chosen:
        x_axis = default_x_axis(crystal, zone_reduced)
    frame = zone_frame(crystal.basis, zone_reduced, x_axis, chosen=chosen)
    radius = disk_mrad * 1e-3

    hkl_all, g_all = enumerate_reflections(crystal.basis, zone_reduced, gmax,
                                           near_disk=(K, radius))
    layer_all = hkl_all @ np.asarray(zone_reduced, dtype=np.int64)

    params = line_parameters(g_all, frame, K)
    reaches = params.g_perp_norm > _MIN_G_PERP
    with np.errstate(divide="ignore", invalid="ignore"):
        p0 = locus_offset(params)
    enters = reaches & (np.abs(p0) < radius)
    candidates = np.flatnonzero(enters)
    candidates = candidates[~crystal.is_absent(hkl_all[candidates])]
    f_abs = np.abs(crystal.structure_factors(hkl_all[candidates]))
    layers = layer_all[candidates]
    holz = layers >= 1
    if np.any(holz) and f_abs[holz].max() > 0:
        divisor = f_abs[holz].max()
    else:
        divisor = f_abs.max() if len(f_abs) and f_abs.max() > 0 else 1.0
        warnings.append("no HOLZ line enters the disk: strengths are relative to the "
                        "strongest zero-layer line")
    strength = f_abs / divisor
    keep = strength >= min_strength
    h_kept = hkl_all[candidates[keep]]
    rounded = np.round(strength[keep], 9)  # ties of symmetry mates sort by hkl
    order = np.lexsort((h_kept[:, 2], h_kept[:, 1], h_kept[:, 0], -rounded, layers[keep]))
    idx = candidates[keep][order]
    hkl = hkl_all[idx]
    lp = LineParameters(params.g_perp[idx], params.g_perp_norm[idx], params.gz[idx], params.c[idx])
    f_kept = f_abs[keep][order]
    strength_kept = strength[keep][order]
    if len(idx) > MAX_LINES:
        raise InputError(f"{len(idx)} lines enter the disk, above the limit of {MAX_LINES}; "
                         "raise --min-strength (min_strength=) or lower --gmax (gmax=)")
    points = _locus_points(lp, radius, n_points) * 1e3

    pairs, xy, angles = _all_crossings(lp, radius, min_angle_deg)

    ring_layers, ring_radii = _rings(crystal, frame, K, gmax)
    zolz_hkl, zolz_mrad = _zero_layer_disks(hkl_all, g_all, layer_all, crystal, frame, K)
    max_conv, overlap_hkl = _max_convergence(zolz_hkl, crystal, beam)
    if disk_mrad > max_conv:
        warnings.append(f"a {disk_mrad:g} mrad disk overlaps the zero-layer disks "
                        f"(largest semi-angle {max_conv:.2f} mrad, set by "
                        f"{' '.join(str(v) for v in overlap_hkl)})")
    if len(hkl) == 0:
        warnings.append("no deficit line above the strength threshold enters the disk")

    return Pattern(
        crystal=crystal, beam=beam, disk_mrad=disk_mrad, frame=frame,
        strain=strain_tensor, gmax=float(gmax), hkl=hkl, laue_zone=layer_all[idx],
        g_inv_A=np.sqrt(np.sum(g_all[idx] ** 2, axis=1)), f_abs=f_kept,
        strength=strength_kept, normal=lp.normal, offset_mrad=lp.straight_offset * 1e3,
        points_mrad=points, crossing_lines=pairs, crossing_mrad=xy * 1e3,
        crossing_angle_deg=angles, ring_layers=ring_layers, ring_radius_mrad=ring_radii,
        max_convergence_mrad=max_conv, overlap_hkl=overlap_hkl,
        zero_layer_hkl=zolz_hkl, zero_layer_mrad=zolz_mrad, warnings=warnings)


def _all_crossings(lp, radius, min_angle_deg):
    n = len(lp.gz)
    i, j = np.triu_indices(n, 1)
    normal = lp.normal
    sin_angle = np.abs(normal[i, 0] * normal[j, 1] - normal[i, 1] * normal[j, 0])
    wide = sin_angle > math.sin(math.radians(min_angle_deg)) * 0.9
    i, j = i[wide], j[wide]

    def sub(idx):
        return LineParameters(lp.g_perp[idx], lp.g_perp_norm[idx], lp.gz[idx], lp.c[idx])

    guess = _straight_intersections(sub(i), sub(j))
    near = np.sum(guess ** 2, axis=1) < (1.2 * radius) ** 2
    i, j, guess = i[near], j[near], guess[near]
    pa, pb = sub(i), sub(j)
    t = _solve_crossings(pa, pb, guess)
    angles = _gradient_angles_deg(pa, pb, t)
    inside = (np.sum(t ** 2, axis=1) <= radius ** 2) & (angles >= min_angle_deg)
    return (np.stack([i[inside], j[inside]], axis=1).astype(int), t[inside], angles[inside])


def _rings(crystal, frame, K, gmax):
    """HOLZ layers n >= 1 whose ring lies within gmax, skipping empty layers.

    Only lattice centring can empty a whole layer (glides and screws remove
    planes and rows of reflections).  The centring-allowed reflections form
    a lattice whose layer indices are the multiples of one step; the step is
    found from the allowed reflections of a small index box, which contains
    a basis of that lattice for every centring type.
    """
    r = np.arange(-2, 3)
    box = np.stack(np.meshgrid(r, r, r, indexing="ij"), axis=-1).reshape(-1, 3)
    centring = crystal._absence_tables[0]
    if len(centring):
        phase = box @ centring.T
        box = box[np.all(np.abs(phase - np.round(phase)) < 1e-6, axis=1)]
    step = math.gcd(*(int(abs(n)) for n in box @ np.asarray(frame.zone)))
    if step == 0:
        return np.zeros(0, dtype=int), np.zeros(0)
    top = int(gmax * gmax / (2 * K * frame.layer_spacing))
    layers = np.arange(step, top + 1, step)
    return layers, ring_radius_mrad(layers, frame.layer_spacing, K)


def _zero_layer_disks(hkl_all, g_all, layer_all, crystal, frame, K):
    zero = np.flatnonzero(layer_all == 0)
    zero = zero[~crystal.is_absent(hkl_all[zero])]
    if len(zero):
        f_abs = np.abs(crystal.structure_factors(hkl_all[zero]))
        zero = zero[f_abs > 1e-6 * f_abs.max()]
    centres = frame.components(g_all[zero])[:, :2] / K * 1e3
    return hkl_all[zero], centres


def _max_convergence(zolz_hkl, crystal, beam):
    """Semi-angle (mrad) at which the central disk meets its nearest zero-layer disk.

    Visible zero-layer reflections count, and so do sums of two of them:
    double diffraction fills in glide and screw absences in the zero layer.
    """
    if not len(zolz_hkl):
        return float("inf"), (0, 0, 0)
    length = np.linalg.norm(crystal.g_vectors(zolz_hkl), axis=1)
    nearest = zolz_hkl[np.argsort(length, kind="stable")[:24]]
    sums = (nearest[:, None, :] + nearest[None, :, :]).reshape(-1, 3)
    candidates = np.concatenate([nearest, sums])
    candidates = candidates[np.any(candidates != 0, axis=1)]
    g = np.linalg.norm(crystal.g_vectors(candidates), axis=1)
    best = int(np.argmin(g))
    theta = math.asin(beam.wavelength_A * g[best] / 2.0)
    return 1e3 * theta, tuple(int(v) for v in candidates[best])
