"""Thin lamellae: HOLZ line profiles with a displacement field varying through the foil.

In a strained device thinned to a TEM lamella the lattice relaxes towards the
two free surfaces; the displacement then varies along the beam and HOLZ lines
broaden or split into parallel components.  This module models, measures and
fits those line profiles.

Profile model (kinematic, column approximation)
-----------------------------------------------
For reflection g the intensity scattered out of the central disk at
excitation error s is (Hirsch et al. 1977, ch. 7 and 8)

    I(s) = | integral_0^t exp(2 pi i (s z + g . u(z))) dz |^2 / t^2,

normalised to 1 at the Bragg condition of a perfect foil, with z the depth
below the entrance surface and u(z) the displacement of the column.  The
deficit line in the disk is proportional to I.  Here

    g . u(z) = ds_mid (z - t/2) + g . w(z),

where ``ds_mid`` is the shift of the excitation error produced by the
uniform strain at mid-foil e_mid (computed through the one forward model,
:mod:`laueline.lines`, for the strained basis (I + e_mid) A: the line moves
to where the strained lattice satisfies 2 K_in.g + |g|^2 = 0), and w(z) is
the relaxation displacement, zero in value and slope at mid-foil, so that
e_mid is the strain in the middle of the foil.  Uniform strain (w = 0) gives
the familiar sinc^2 line of width ~1/t centred on the exact locus.

The excitation error of a disk point t is s = -(2 K_in.g + |g|^2) / (2K) =
-G r(t), with r the Bragg-condition residual of
:func:`laueline.lines.locus_residual` (a distance in radians across the line)
and G the in-plane length of g: the local derivative of s across the line.

Relaxation families (w in the disk frame x, y, B):

``uniform``
    w = 0.
``cosh``
    w(z) = (ux, uy, 0) [cosh((z - t/2)/L) - 1] / [cosh(t/(2L)) - 1]: the
    lattice at both surfaces is displaced by (ux, uy) with respect to the
    mid-plane, the displacement decaying as cosh from the mid-plane with
    length L.  This is the form of the free-surface (boundary-layer)
    relaxation of a thin strained plate, symmetric about its mid-plane, as
    used in kinematic analyses of HOLZ line splitting in lamellae
    (Clement, Pantel, Kwakman and Rouviere 2004; Houdellier et al. 2006;
    both from memory).  Parameters ``ux_nm``, ``uy_nm``, ``decay_length_nm``.
``relaxed-strain``
    No displacement family but the strain itself relaxing towards both
    surfaces: e(z) = e_mid f(z), f = 1 - r [cosh((z - t/2)/L) - 1] /
    [cosh(t/(2L)) - 1], so the local excitation error is s + ds_mid f(z) and
    g.u(z) = ds_mid integral_0^z f dz' (the surface layers draw a line nearer
    the unstrained locus).  Parameters ``relaxed_fraction`` (r: 0 none, 1
    fully relaxed surfaces) and ``decay_length_nm``.
``table``
    w(z) from a CSV table (:func:`read_displacement_table`), for example a
    finite-element model, times a fitted ``scale`` (1 = as given).

What the kinematic model cannot see, and says: (1) dynamical effects (line
positions and shapes of strong reflections, absorption) are ignored; (2) the
profile is unchanged when the foil is turned over (z -> t - z with u -> -u):
the two surfaces are not told apart; (3) a displacement along the beam (uz)
hardly affects HOLZ lines whose g lies almost in the disk plane and is not
fitted by the ``cosh`` family.

References
----------
Hirsch, P. B., Howie, A., Nicholson, R. B., Pashley, D. W. and Whelan, M. J.
(1977). Electron Microscopy of Thin Crystals, 2nd ed. Krieger (kinematic
theory of imperfect crystals; sinc^2 rocking curve).
Clement, L., Pantel, R., Kwakman, L. F. Tz. and Rouviere, J. L. (2004).
Strain measurements by convergent-beam electron diffraction: the importance
of stress relaxation in lamella preparations. Appl. Phys. Lett. 85, 651
(from memory).
Houdellier, F., Roucau, C., Clement, L., Rouviere, J. L. and Casanove, M. J.
(2006). Quantitative analysis of HOLZ line splitting in CBED patterns of
epitaxially strained layers. Ultramicroscopy 106, 951 (from memory).
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["MODELS", "RELAXATION_SCHEMA", "CAUTIONS", "DisplacementTable",
           "read_displacement_table", "relaxation_displacement", "kinematic_profile",
           "relaxed_strain_fraction", "relaxed_strain_phase_depth", "excitation_errors",
           "strain_shifts", "LineProfiles", "measure_line_profiles",
           "ProfileData", "ProfileFit", "fit_profiles", "profile_data", "RelaxationResult",
           "relaxation", "LineAssessment", "assess_line_profiles", "line_shape_warning"]

RELAXATION_SCHEMA = "laueline.relaxation/1"
MODELS = ("uniform", "cosh", "relaxed-strain", "table")
STRAIN_COMPONENTS = ("exx", "eyy", "ezz", "eyz", "exz", "exy")
_VOIGT = ((0, 0), (1, 1), (2, 2), (1, 2), (0, 2), (0, 1))
_N_SLABS = 256           # depth slabs of the profile integral
_FWHM = 2.0 * math.sqrt(2.0 * math.log(2.0))
_SINC2_FWHM = 0.8859     # FWHM of sinc^2(s t) in units of 1/t (Hirsch et al. 1977)

CAUTIONS = (
    "The line-profile model is kinematic: dynamical effects (shifts and shapes of strong "
    "lines, absorption) are ignored; treat the relaxation parameters as a kinematic "
    "description of the profiles, not as a dynamical result.",
    "A kinematic profile is unchanged when the foil is turned over: the two surfaces are "
    "not told apart, and a relaxation at one surface only looks like one at the other.",
    "The strain reported is that of the lamella at mid-foil; the bulk device before "
    "thinning may differ.",
)

PARAMETERS = {"uniform": (), "cosh": ("ux_nm", "uy_nm", "decay_length_nm"),
              "relaxed-strain": ("relaxed_fraction", "decay_length_nm"), "table": ("scale",)}
PARAMETER_UNITS = {"ux_nm": "nm", "uy_nm": "nm", "decay_length_nm": "nm", "scale": "",
                   "relaxed_fraction": "",
                   **{c: "" for c in STRAIN_COMPONENTS},
                   "center_x": "px", "center_y": "px", "rotation": "deg",
                   "instrument_sigma_px": "px"}


# ---------------------------------------------------------------------------
# displacement through the foil
# ---------------------------------------------------------------------------

@dataclass
class DisplacementTable:
    """A relaxation displacement through the foil, disk frame (x, y, B), nm.

    ``u_nm`` holds the displacement with its value and slope at mid-foil
    removed (those belong to the mid-foil strain).
    """

    z_nm: np.ndarray
    u_nm: np.ndarray       # (m, 3)
    source: str = ""
    kind: str = "displacement"


_U_COLUMNS = ("ux_nm", "uy_nm", "uz_nm")
_E_COLUMNS = ("exz", "eyz", "ezz")


def read_displacement_table(path, thickness_nm):
    """Read a CSV table of the relaxation through the foil.

    Columns (header row; ``#`` lines are comments): ``z_nm``, the depth below
    the entrance surface, strictly monotonic and within [0, t]; then either
    displacements ``ux_nm``, ``uy_nm``, ``uz_nm`` (any of them, disk frame:
    x, y in the disk, z along the zone axis toward the source) or strains
    ``exz``, ``eyz``, ``ezz`` (tensor components, disk frame), integrated to
    displacements as du_x/dz = 2 e_xz, du_y/dz = 2 e_yz, du_z/dz = e_zz.
    The value and slope at mid-foil are removed: they are the mid-foil strain.

    Raises
    ------
    InputError
        For a missing thickness, unreadable file, missing or mixed columns,
        non-numeric values, depths that are not monotonic or lie outside the
        foil, or a table that does not span the foil.
    """
    thickness_nm = _check_thickness(thickness_nm)
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}") from None
    rows = [r for r in csv.reader(line for line in text.splitlines()
                                  if line.strip() and not line.lstrip().startswith("#"))]
    if len(rows) < 3:
        raise InputError(f"{path}: a displacement table needs a header and at least two rows")
    header = [h.strip() for h in rows[0]]
    if "z_nm" not in header:
        raise InputError(f"{path}: no z_nm column (columns: {', '.join(header)})")
    has_u = [c for c in _U_COLUMNS if c in header]
    has_e = [c for c in _E_COLUMNS if c in header]
    if bool(has_u) == bool(has_e):
        raise InputError(f"{path}: give displacements ({', '.join(_U_COLUMNS)}) or strains "
                         f"({', '.join(_E_COLUMNS)}), not both and not neither")
    try:
        data = np.array([[float(r[header.index(c)]) for c in ["z_nm"] + has_u + has_e]
                         for r in rows[1:]])
    except (ValueError, IndexError):
        raise InputError(f"{path}: every row needs a number in each named column") from None
    if not np.all(np.isfinite(data)):
        raise InputError(f"{path}: non-finite values in the table")
    z = data[:, 0]
    step = np.diff(z)
    if not (np.all(step > 0) or np.all(step < 0)):
        raise InputError(f"{path}: z_nm is not strictly monotonic (the depth must increase "
                         "or decrease throughout)")
    order = np.argsort(z)
    z, data = z[order], data[order]
    tol = 1e-6 * thickness_nm
    if z[0] < -tol or z[-1] > thickness_nm + tol:
        raise InputError(f"{path}: depths from {z[0]:g} to {z[-1]:g} nm lie outside the foil "
                         f"(0 to {thickness_nm:g} nm)")
    if z[0] > 0.05 * thickness_nm or z[-1] < 0.95 * thickness_nm:
        raise InputError(f"{path}: depths from {z[0]:g} to {z[-1]:g} nm do not span the foil "
                         f"(0 to {thickness_nm:g} nm)")
    values = np.zeros((len(z), 3))
    names = has_u or has_e
    for k, name in enumerate(names):
        col = (_U_COLUMNS if has_u else _E_COLUMNS).index(name)
        values[:, col] = data[:, 1 + k]
    if has_e:
        from scipy.integrate import cumulative_trapezoid

        factor = np.array([2.0, 2.0, 1.0])
        values = cumulative_trapezoid(values * factor, z, axis=0, initial=0.0)
    u = _remove_mid_value_and_slope(z, values, thickness_nm)
    return DisplacementTable(z, u, str(path), "displacement" if has_u else "strain")


def _remove_mid_value_and_slope(z, u, thickness_nm):
    mid = 0.5 * thickness_nm
    value = np.array([np.interp(mid, z, u[:, k]) for k in range(3)])
    h = 0.01 * thickness_nm
    slope = np.array([(np.interp(mid + h, z, u[:, k]) - np.interp(mid - h, z, u[:, k]))
                      / (2 * h) for k in range(3)])
    return u - value - (z[:, None] - mid) * slope


def _check_thickness(thickness_nm):
    if thickness_nm is None:
        raise InputError("the foil thickness is missing: give thickness_nm (--thickness-nm)")
    t = float(thickness_nm)
    if not math.isfinite(t) or t <= 0:
        raise InputError(f"thickness_nm must be positive, got {t:g}")
    if t > 2000:
        raise InputError(f"thickness_nm {t:g} is beyond a TEM lamella; give it in nm")
    return t


def relaxation_displacement(model, values, z_nm, thickness_nm, table=None):
    """Relaxation displacement w(z) in the disk frame, nm, shape (m, 3).

    Parameters
    ----------
    model : {'uniform', 'cosh', 'table'}
    values : sequence of float
        The model's parameters (:data:`PARAMETERS`), nm or dimensionless.
    z_nm : ndarray (m,)
        Depths below the entrance surface.
    thickness_nm : float
    table : DisplacementTable, for ``model='table'``
    """
    z = np.asarray(z_nm, dtype=float)
    out = np.zeros(z.shape + (3,))
    if model == "uniform":
        return out
    if model == "cosh":
        ux, uy, length = (float(v) for v in values)
        half = 0.5 * thickness_nm / length
        # cosh(x) - 1 = 2 sinh^2(x / 2), without cancellation near the mid-plane
        shape = (np.sinh(0.5 * (z - 0.5 * thickness_nm) / length) / math.sinh(0.5 * half)) ** 2
        out[..., 0] = ux * shape
        out[..., 1] = uy * shape
        return out
    if model == "table":
        if table is None:
            raise InputError("the table model needs a displacement table")
        scale = float(values[0])
        for k in range(3):
            out[..., k] = scale * np.interp(z, table.z_nm, table.u_nm[:, k])
        return out
    raise InputError(f"unknown relaxation model '{model}'; choose one of {', '.join(MODELS)}")


def relaxed_strain_fraction(fraction, decay_length_nm, z_nm, thickness_nm):
    """f(z) of the ``relaxed-strain`` family: the strain at depth z over the mid-foil strain.

    f = 1 - r [cosh((z - t/2)/L) - 1] / [cosh(t/(2L)) - 1]: 1 at mid-foil,
    1 - r at both surfaces.
    """
    half = 0.5 * thickness_nm / decay_length_nm
    x = 0.5 * (np.asarray(z_nm, dtype=float) - 0.5 * thickness_nm) / decay_length_nm
    return 1.0 - fraction * (np.sinh(x) / math.sinh(0.5 * half)) ** 2


def relaxed_strain_phase_depth(fraction, decay_length_nm, z_nm, thickness_nm):
    """integral from t/2 to z of (f - 1) dz', nm, for :func:`relaxed_strain_fraction`.

    Closed form -r [L sinh((z - t/2)/L) - (z - t/2)] / [cosh(t/(2L)) - 1]; the
    phase of reflection g is then its mid-foil shift of the excitation error
    times this depth.
    """
    length = float(decay_length_nm)
    zc = np.asarray(z_nm, dtype=float) - 0.5 * thickness_nm
    denom = 2.0 * math.sinh(0.25 * thickness_nm / length) ** 2      # cosh(t/2L) - 1
    return -fraction * (length * np.sinh(zc / length) - zc) / denom


# ---------------------------------------------------------------------------
# the profile integral
# ---------------------------------------------------------------------------

def _slab_weights(g_dot_u):
    """Phase factors of the depth slabs: exp(2 pi i g.u at the slab centre) sinc(change of g.u)."""
    gu = np.asarray(g_dot_u, dtype=float)
    return np.exp(1j * np.pi * (gu[..., 1:] + gu[..., :-1])) * np.sinc(gu[..., 1:] - gu[..., :-1])


def kinematic_profile(s_inv_A, g_dot_u, thickness_nm):
    """Kinematic line profile |integral_0^t exp(2 pi i (s z + g.u(z))) dz|^2 / t^2.

    The foil is cut into N equal slabs.  In each, g.u is taken as linear
    between its values at the slab edges and s z is integrated exactly; the
    slab integral exp(2 pi i (s z_j + gu_j)) dz sinc((s + gamma_j) dz) is
    then written as dz exp(...) sinc(s dz) sinc(gamma_j dz), exact when g.u
    is linear (uniform strain) and otherwise in error by about
    pi^2 (s dz)(gamma_j dz) / 3, below 1e-3 for the default N = 256 over a
    profile a few line widths wide.

    Parameters
    ----------
    s_inv_A : ndarray, shape (n, k)
        Excitation errors, 1/angstrom, for n lines.
    g_dot_u : ndarray, shape (n, N + 1)
        g . u (dimensionless, cycles) at depths linspace(0, t, N + 1).
    thickness_nm : float

    Returns
    -------
    ndarray (n, k)
        Intensity relative to the Bragg condition of a perfect foil.
    """
    s = np.asarray(s_inv_A, dtype=float)
    weights = _slab_weights(g_dot_u)                     # (n, N)
    n_slabs = weights.shape[-1]
    dz = 10.0 * thickness_nm / n_slabs
    z_mid = (np.arange(n_slabs) + 0.5) * dz
    phase = np.exp(2j * np.pi * s[..., None] * z_mid)    # (n, k, N)
    amp = np.sinc(s * dz) * np.einsum("...kn,...n->...k", phase, weights) / n_slabs
    return amp.real ** 2 + amp.imag ** 2


class _ProfileEngine:
    """:func:`kinematic_profile` for profiles on fixed grids s = s0_p + slope_p d_k.

    exp(2 pi i slope_p d_k z_j) is computed once; each evaluation needs only
    the slab weights and one batched complex matrix product.
    """

    def __init__(self, slope, d, thickness_nm, n_slabs):
        self.dz = 10.0 * thickness_nm / n_slabs
        self.z_mid = (np.arange(n_slabs) + 0.5) * self.dz
        self.sd = np.asarray(slope, dtype=float)[:, None] * np.asarray(d, dtype=float)[None, :]
        self.phase = np.exp(2j * np.pi * self.sd[..., None] * self.z_mid)   # (p, k, N)

    def __call__(self, s0, g_dot_u):
        weights = _slab_weights(g_dot_u) * np.exp(2j * np.pi * np.asarray(s0)[:, None]
                                                  * self.z_mid)
        s = np.asarray(s0)[:, None] + self.sd
        amp = np.sinc(s * self.dz) * np.einsum("pkn,pn->pk", self.phase, weights) / len(
            self.z_mid)
        return amp.real ** 2 + amp.imag ** 2


def excitation_errors(t_mrad, params):
    """Excitation errors s = -(2 K_in.g + |g|^2) / (2K), 1/angstrom.

    Parameters
    ----------
    t_mrad : ndarray (n, ..., 2)
        Disk points for each of n lines.
    params : laueline.lines.LineParameters
    """
    from .lines import locus_residual

    t = np.asarray(t_mrad, dtype=float) * 1e-3
    extra = (slice(None),) + (None,) * (t.ndim - 2)
    return -params.g_perp_norm[extra] * locus_residual(t, params)


def strain_shifts(basis, zone, x_axis, wave_number, hkl, t_mrad, step=1e-5):
    """Change of each line's excitation error per unit strain component, (n, 6).

    Central differences of :func:`excitation_errors` for bases (I + e) A,
    e one of the six components (exx eyy ezz eyz exz exy; tensor shears),
    at the disk points ``t_mrad`` (n, 2) of the n reflections ``hkl``.
    """
    from .lines import LineParameters, line_parameters_batch

    eye = np.zeros((12, 3, 3))
    for c, (i, j) in enumerate(_VOIGT):
        for k, sign in enumerate((1.0, -1.0)):
            eye[2 * c + k, i, j] += sign * step
            if i != j:
                eye[2 * c + k, j, i] += sign * step
    bases = (np.eye(3) + eye) @ np.asarray(basis, dtype=float)
    lp = line_parameters_batch(bases, zone, x_axis, wave_number, np.asarray(hkl))  # (12, n)
    n = len(hkl)
    flat = LineParameters(lp.g_perp.reshape(-1, 2), lp.g_perp_norm.ravel(), lp.gz.ravel(),
                          lp.c.ravel())
    t = np.broadcast_to(np.asarray(t_mrad, dtype=float), (12, n, 2)).reshape(-1, 2)
    s = excitation_errors(t, flat).reshape(12, n)
    return ((s[0::2] - s[1::2]) / (2 * step)).T


# ---------------------------------------------------------------------------
# measuring profiles in an image
# ---------------------------------------------------------------------------

@dataclass
class LineProfiles:
    """Intensity profiles across lines, averaged along stretches of them.

    One profile per (line, segment): each line's chord is cut into
    ``segments`` stretches so that the fit sees where along the line it
    lies (the centre and rotation of the pattern), not only its offset.

    Attributes
    ----------
    hkl : ndarray (p, 3)
    segment : ndarray (p,) of int
    offset_px : ndarray (k,)
        Across-line coordinate of the samples, px, along ``normals``.
    intensity, sigma : ndarray (p, k)
        Mean intensity relative to the flanks of the profile, and its
        standard uncertainty (scatter along the line over the square root of
        the number of independent stretches).
    columns_px, normals : list of ndarray (c, 2)
        Points on the reference locus where columns were taken, and the unit
        normals along which they were sampled.
    n_columns : ndarray (p,) of int
        Fewest columns averaged at any offset.
    masks : list of ndarray (c, k) of bool
        The samples of each column that entered the average.
    """

    hkl: np.ndarray
    segment: np.ndarray
    offset_px: np.ndarray
    intensity: np.ndarray
    sigma: np.ndarray
    columns_px: list
    normals: list
    n_columns: np.ndarray
    masks: list = field(default_factory=list)

    def __len__(self):
        return len(self.hkl)


def _resample(polyline, spacing):
    """Points every ``spacing`` px along a polyline (m, 2), and unit tangents."""
    steps = np.linalg.norm(np.diff(polyline, axis=0), axis=1)
    arc = np.concatenate([[0.0], np.cumsum(steps)])
    n = max(int(arc[-1] / spacing), 1) + 1
    a = np.linspace(0.0, arc[-1], n)
    pts = np.stack([np.interp(a, arc, polyline[:, 0]), np.interp(a, arc, polyline[:, 1])], 1)
    tangent = np.gradient(pts, axis=0) if n > 1 else np.array([[1.0, 0.0]])
    tangent /= np.linalg.norm(tangent, axis=1, keepdims=True)
    return pts, tangent


def measure_line_profiles(image, loci_px, hkl, disk_center_px, disk_radius_px, *,
                          half_width_px, step_px=0.5, along_step_px=2.0, segments=2,
                          obstacles_px=(), clearance_px=None, min_columns=6):
    """Intensity profiles across lines along the normal of a reference locus.

    Along each locus (a polyline in pixels, for example a predicted exact
    locus), columns are taken every ``along_step_px``; each column samples
    the image (bilinear) at offsets -W..W along the local normal.  Samples
    outside the disk or within ``clearance_px`` of another line
    (``obstacles_px``) are left out, so a crossing removes only the samples
    near it.  Each column is divided by the mean of its outer quarter on both
    sides (removing the slow background), and the columns of each stretch are
    averaged offset by offset.  Because the reference is the exact (curved)
    locus, the averaging needs no straightness test.

    Parameters
    ----------
    image : ndarray (rows, cols)
    loci_px : sequence of ndarray (m, 2)
    hkl : ndarray (n, 3)
    disk_center_px, disk_radius_px : the central disk
    half_width_px, step_px : float
        Half-width W of each profile and sample spacing, px.
    along_step_px : float
        Column spacing along the line; about twice the blur so that columns
        are nearly independent.
    segments : int
        Stretches per line, each giving its own profile.
    obstacles_px : sequence of ndarray (m, 2)
        Lines to keep clear of (the profiled lines may be among them).
    clearance_px : float, optional
        Distance kept from other lines; W / 2 by default.
    min_columns : int
        Stretches with fewer usable samples at any offset are left out.

    Returns
    -------
    LineProfiles
    """
    from scipy import ndimage
    from scipy.spatial import cKDTree

    image = np.asarray(image, dtype=float)
    w = float(half_width_px)
    if not (w > 2 * step_px):
        raise InputError(f"half_width_px must exceed two samples, got {w:g}")
    clearance = 0.5 * w if clearance_px is None else float(clearance_px)
    offsets = np.arange(-w, w + 0.5 * step_px, step_px)
    flank = np.abs(offsets) >= 0.75 * w
    centre = np.asarray(disk_center_px, dtype=float)
    rows, cols = image.shape
    out = {k: [] for k in ("hkl", "segment", "intensity", "sigma", "columns", "normals",
                           "n", "masks")}
    dense = [_resample(np.asarray(o, dtype=float), 1.0)[0] for o in obstacles_px]
    for i, locus in enumerate(loci_px):
        locus = np.asarray(locus, dtype=float)
        pts, tangent = _resample(locus, along_step_px)
        normal = np.stack([-tangent[:, 1], tangent[:, 0]], 1)
        sample = pts[:, None, :] + offsets[None, :, None] * normal[:, None, :]
        ok = np.linalg.norm(sample - centre, axis=-1) <= disk_radius_px - 2.0
        ok &= (sample[..., 0] >= 0) & (sample[..., 0] <= cols - 1) & \
            (sample[..., 1] >= 0) & (sample[..., 1] <= rows - 1)
        others = [d for d, o in zip(dense, obstacles_px) if not _same_polyline(o, locus)]
        if others:
            dist, _ = cKDTree(np.concatenate(others)).query(sample.reshape(-1, 2))
            ok &= dist.reshape(ok.shape) > clearance
        values = ndimage.map_coordinates(image, [sample[..., 1], sample[..., 0]], order=1,
                                         mode="nearest")
        values = np.where(ok, values, np.nan)
        flank_ok = ok & flank
        level = np.sum(np.where(flank_ok, values, 0.0), axis=1) / np.maximum(
            np.sum(flank_ok, axis=1), 1)
        good_col = (level > 0) & (np.sum(flank_ok, axis=1) >= 4)
        values = values / np.where(good_col, level, 1.0)[:, None]
        values[~good_col] = np.nan
        pieces = np.array_split(np.arange(len(pts)), segments)
        for k, idx in enumerate(pieces):
            v = values[idx]
            count = np.sum(np.isfinite(v), axis=0)
            if count.min() < min_columns:
                continue
            used = np.any(np.isfinite(v), axis=1)
            out["masks"].append(np.isfinite(v[used]))
            out["hkl"].append(hkl[i])
            out["segment"].append(k)
            out["intensity"].append(np.nanmean(v, axis=0))
            # a noise-free image leaves only rounding in the scatter: floor at 1e-4 of
            # the flank level (16-bit quantisation of a bright disk)
            out["sigma"].append(np.maximum(np.nanstd(v, axis=0, ddof=1) / np.sqrt(count),
                                           1e-4))
            out["columns"].append(pts[idx][used])
            out["normals"].append(normal[idx][used])
            out["n"].append(int(count.min()))
    if not out["hkl"]:
        return LineProfiles(np.zeros((0, 3), int), np.zeros(0, int), offsets,
                            np.zeros((0, len(offsets))), np.zeros((0, len(offsets))), [], [],
                            np.zeros(0, int), [])
    return LineProfiles(np.array(out["hkl"]), np.array(out["segment"]), offsets,
                        np.array(out["intensity"]), np.array(out["sigma"]), out["columns"],
                        out["normals"], np.array(out["n"]), out["masks"])


def _same_polyline(a, b):
    return a.shape == np.shape(b) and np.array_equal(a, b)


# ---------------------------------------------------------------------------
# fitting
# ---------------------------------------------------------------------------

@dataclass
class ProfileData:
    """What the fit needs of each measured profile (p profiles, k samples).

    ``s_at_offset`` holds (s0, ds/dpx): the reference excitation error
    (1/angstrom, unstrained reference lattice, calibrated voltage, starting
    detector) at the profile's zero offset and its slope across the line;
    ``strain_shift`` (p, 6) the change of s per unit strain component;
    ``detector_shift`` (p, 3) per px of centre x, y and per degree of
    rotation; ``g_frame`` (p, 3) the reflection in the disk frame, 1/A.
    """

    offset_px: np.ndarray
    intensity: np.ndarray
    sigma: np.ndarray
    s_at_offset: np.ndarray
    strain_shift: np.ndarray
    detector_shift: np.ndarray
    g_frame: np.ndarray


@dataclass
class ProfileFit:
    """Result of :func:`fit_profiles`."""

    model: str
    names: list
    values: np.ndarray
    sigmas: np.ndarray
    units: list
    covariance: np.ndarray
    correlation: np.ndarray
    chi2: float
    dof: int
    success: bool
    message: str
    fitted: np.ndarray           # (p, k) model intensities
    uniform: np.ndarray          # (p, k) uniform-strain profile at the same strain and blur
    linear: np.ndarray           # (p, 3) background, slope, depth of each profile
    inflated: bool = False
    sigmas_stat: np.ndarray | None = None   # from the profile noise alone
    shift_ratio: float = 1.0     # scatter of profile positions over their noise

    def value(self, name):
        i = self.names.index(name)
        return float(self.values[i]), float(self.sigmas[i])


_STRAIN_UNIT = 1e-3


class _Model:
    """Forward model of all profiles for a parameter vector (nonlinear part)."""

    def __init__(self, data, thickness_nm, model, table, instrument_sigma_px, n_slabs,
                 fixed):
        self.data = data
        self.t = thickness_nm
        self.model = model
        self.table = table
        self.shape_names = list(PARAMETERS[model])
        self.fit_sigma = instrument_sigma_px is None
        self.sigma_px = instrument_sigma_px
        self.fixed = dict(fixed or {})
        names = list(STRAIN_COMPONENTS) + ["center_x", "center_y", "rotation"]
        names += self.shape_names
        if self.fit_sigma:
            names.append("instrument_sigma_px")
        self.all_names = names
        self.free = [n for n in names if n not in self.fixed]
        d = data.offset_px
        # the blur maps a grid reaching four of the widest blurs beyond the samples,
        # fine enough for the narrowest blur and the profile's fringes, onto the samples
        half_width = float(np.max(np.abs(d)))
        margin = 4.0 * _bounds(["instrument_sigma_px"], thickness_nm, half_width)[1][0]
        step = 0.25
        self.d_ext = np.arange(d[0] - margin, d[-1] + margin + 0.5 * step, step)
        self.z_nm = np.linspace(0.0, thickness_nm, n_slabs + 1)
        self.w = 1.0 / data.sigma
        self.engine = _ProfileEngine(data.s_at_offset[:, 1], self.d_ext, thickness_nm, n_slabs)
        g_len = float(np.median(np.linalg.norm(data.g_frame[:, :2], axis=1)))
        # finite-difference steps: 1e-4 of a displacement of one cycle, of t, of a pixel
        self.steps = {"ux_nm": 1e-5 / g_len, "uy_nm": 1e-5 / g_len, "relaxed_fraction": 1e-4,
                      "decay_length_nm": 1e-4 * thickness_nm, "scale": 1e-4,
                      "instrument_sigma_px": 1e-4}
        self.upper = _bounds(self.free, thickness_nm, float(np.max(np.abs(data.offset_px))))[1]

    def full(self, x):
        v = dict(self.fixed)
        v.update(zip(self.free, x))
        return v

    def intrinsic(self, v, relax=True, extra_shift=0.0):
        data = self.data
        e = np.array([v[c] for c in STRAIN_COMPONENTS]) * _STRAIN_UNIT
        det = np.array([v["center_x"], v["center_y"], v["rotation"]])
        shift = data.strain_shift @ e + data.detector_shift @ det + extra_shift
        if relax and self.model == "relaxed-strain":
            # local excitation error s + ds_mid f(z): phase ds_mid integral (f - 1) dz
            depth = relaxed_strain_phase_depth(v["relaxed_fraction"], v["decay_length_nm"],
                                               self.z_nm, self.t)
            gu = (data.strain_shift @ e)[:, None] * 10.0 * depth[None, :]
        elif relax and self.shape_names:
            u = relaxation_displacement(self.model, [v[n] for n in self.shape_names],
                                        self.z_nm, self.t, self.table)
            gu = 10.0 * data.g_frame @ u.T      # 1/A times nm -> cycles
        else:
            gu = np.zeros((len(shift), len(self.z_nm)))
        return self.engine(data.s_at_offset[:, 0] + shift, gu)

    def blur(self, v, profile):
        sig = v.get("instrument_sigma_px", self.sigma_px)
        diff = self.data.offset_px[:, None] - self.d_ext[None, :]
        kern = np.exp(-0.5 * (diff / sig) ** 2)
        kern /= kern.sum(axis=1, keepdims=True)
        return profile @ kern.T

    def design(self, shape):
        p, k = shape.shape
        d = np.broadcast_to(self.data.offset_px, (p, k))
        return np.stack([np.ones((p, k)), d, -shape], axis=-1)   # (p, k, 3)

    def linear(self, shape):
        """Background, slope and depth of each profile by weighted least squares."""
        a = self.design(shape) * self.w[..., None]
        y = self.data.intensity * self.w
        ata = np.einsum("pki,pkj->pij", a, a) + 1e-12 * np.eye(3)
        aty = np.einsum("pki,pk->pi", a, y)
        coef = np.linalg.solve(ata, aty[..., None])[..., 0]
        return coef, a, y

    def evaluate(self, v, extra_shift=0.0):
        shape = self.blur(v, self.intrinsic(v, extra_shift=extra_shift))
        coef, a, y = self.linear(shape)
        return (np.einsum("pki,pi->pk", a, coef) - y).ravel()

    def residuals(self, x):
        return self.evaluate(self.full(x))

    def jacobian(self, x):
        """Jacobian of the projected residuals.

        The strain, centre and rotation move each profile rigidly by one
        excitation-error shift, so one evaluation with every profile shifted
        gives all their columns (profiles are independent of each other);
        the relaxation parameters and the blur take one evaluation each.
        """
        v = self.full(x)
        r0 = self.evaluate(v)
        p, k = self.data.intensity.shape
        jac = np.empty((r0.size, len(self.free)))
        rigid = np.concatenate([self.data.strain_shift * _STRAIN_UNIT,
                                self.data.detector_shift], axis=1)     # (p, 9)
        rigid_names = list(STRAIN_COMPONENTS) + ["center_x", "center_y", "rotation"]
        h = 0.01 / (10.0 * self.t)                                      # 1/100 of 1/t
        d_shift = ((self.evaluate(v, h) - r0) / h).reshape(p, k)
        shape_depends_on_strain = self.model == "relaxed-strain"
        for j, name in enumerate(self.free):
            if name in STRAIN_COMPONENTS and shape_depends_on_strain:
                vv = dict(v)
                vv[name] = v[name] + 1e-3                               # 1e-6 strain
                jac[:, j] = (self.evaluate(vv) - r0) / 1e-3
            elif name in rigid_names:
                jac[:, j] = (d_shift * rigid[:, rigid_names.index(name), None]).ravel()
            else:
                step = self.steps[name] * (1.0 if x[j] <= self.upper[j] - self.steps[name]
                                           else -1.0)
                vv = dict(v)
                vv[name] = v[name] + step
                jac[:, j] = (self.evaluate(vv) - r0) / step
        return jac


def _bounds(names, thickness_nm, half_width_px):
    lo, hi = [], []
    for n in names:
        if n == "decay_length_nm":
            lo.append(thickness_nm / 100.0)
            hi.append(3.0 * thickness_nm)
        elif n == "instrument_sigma_px":
            lo.append(0.2)
            hi.append(max(0.25 * half_width_px, 0.5))
        elif n == "relaxed_fraction":
            lo.append(-1.0)
            hi.append(2.0)
        elif n == "scale":
            lo.append(-10.0)
            hi.append(10.0)
        else:
            lo.append(-np.inf)
            hi.append(np.inf)
    return np.array(lo), np.array(hi)


_RIGID = tuple(STRAIN_COMPONENTS) + ("center_x", "center_y", "rotation")


def _shift_scatter(m, x, n_rigid):
    """Birge ratio of the profiles' own best shifts about the fitted ones.

    Each profile's best extra shift and its sigma follow from one
    Gauss-Newton step on its residuals; the ratio is
    sqrt(sum (shift / sigma)^2 / (profiles - rigid parameters)).
    """
    v = m.full(x)
    r0 = m.evaluate(v)
    p = m.data.intensity.shape[0]
    h = 0.01 / (10.0 * m.t)
    jac = ((m.evaluate(v, h) - r0) / h).reshape(p, -1)
    r0 = r0.reshape(p, -1)
    info = np.sum(jac * jac, axis=1)
    shift = -np.sum(jac * r0, axis=1) / np.maximum(info, 1e-300)
    dof = p - n_rigid
    if dof < 1:
        return 1.0
    return float(math.sqrt(np.sum(shift ** 2 * info) / dof))


def _rigid_start(m, values, half_width_px):
    """Start values of strain, centre and rotation from a position scan of every profile.

    Each profile is compared with a line of uniform strain, blurred to the
    profile's own width, at shifts across the whole window; the best shift
    of every profile (in excitation error) then gives the rigid parameters by
    linear least squares through their per-profile shifts.
    """
    data = m.data
    slope = np.abs(data.s_at_offset[:, 1])
    deficit = data.intensity.max(axis=1, keepdims=True) - data.intensity
    width = np.median(_fwhm(data.offset_px, deficit))
    v = dict(values, instrument_sigma_px=max(float(width) / _FWHM, 0.5))
    grid = np.linspace(-0.8, 0.8, 41) * half_width_px            # px
    costs = np.empty((len(grid), len(slope)))
    for j, step in enumerate(grid):                               # 41 evaluations
        r = m.evaluate(v, step * slope).reshape(len(slope), -1)
        costs[j] = np.sum(r * r, axis=1)
    best = grid[np.argmin(costs, axis=0)] * slope                 # (p,) extra shift, 1/A
    rigid = np.concatenate([data.strain_shift * _STRAIN_UNIT, data.detector_shift], axis=1)
    names = list(STRAIN_COMPONENTS) + ["center_x", "center_y", "rotation"]
    free = [k for k, n in enumerate(names) if n not in m.fixed]
    scale = np.linalg.norm(rigid[:, free], axis=0)
    scale[scale == 0] = 1.0
    # robust (a profile may lock onto a neighbour) and damped towards the given start
    from scipy.optimize import least_squares

    a = rigid[:, free] / scale
    width_s = np.median(slope) * max(float(width), 1.0)
    damping = 0.05 * np.linalg.norm(a, 2)
    fit = least_squares(lambda x: np.concatenate([(a @ x - best) / width_s, damping * x]),
                        np.zeros(len(free)), loss="soft_l1", f_scale=0.5)
    step = fit.x / scale
    out = dict(values)
    for k, dv in zip(free, step):
        out[names[k]] = values[names[k]] + dv
    return out


def fit_profiles(data, thickness_nm, model="cosh", *, table=None, start=None,
                 instrument_sigma_px=None, hold=(), n_slabs=_N_SLABS, scan=True):
    """Fit the mid-foil strain and the relaxation to all profiles at once.

    Nonlinear parameters: the six mid-foil strain components (crystal
    Cartesian frame, basis (I + e) A), the pattern centre and rotation
    (offsets from the detector the profiles were measured with), the
    relaxation parameters of ``model`` and the instrument blur (Gaussian
    sigma, px; held when ``instrument_sigma_px`` is given).  Each profile
    also has a background, a background slope and a depth, solved by linear
    least squares for every trial of the others (variable projection).
    :func:`scipy.optimize.least_squares` minimises the residuals whitened by
    the measured sigmas; the covariance of the nonlinear parameters is
    (J^T J)^-1 of the projected problem, scaled up by chi2/dof when that
    exceeds 1.  A profile as a whole may also be moved by what the model
    lacks (a neighbouring line's wing, a dynamical shift): the scatter of
    each profile's own best position about the fitted one, over its
    statistical sigma (a Birge ratio over profiles - rigid parameters),
    scales the strain, centre and rotation uncertainties up when above 1;
    ``sigmas_stat`` keeps the purely statistical values.

    For the ``cosh`` family the surface displacement is first located by a
    scan over its size and direction (the profile is not a convex function
    of it), then everything is refined together.

    Parameters
    ----------
    data : ProfileData
    thickness_nm : float
    model : {'uniform', 'cosh', 'table'}
    table : DisplacementTable, for ``model='table'``
    start : dict, optional
        Start values by name (strain components dimensionless).
    instrument_sigma_px : float, optional
    hold : sequence of str
        Parameter names held at their start values.

    Returns
    -------
    ProfileFit
    """
    from scipy.optimize import least_squares

    thickness_nm = _check_thickness(thickness_nm)
    if model not in MODELS:
        raise InputError(f"unknown relaxation model '{model}'; choose one of {', '.join(MODELS)}")
    if model == "table" and table is None:
        raise InputError("model 'table' needs a displacement table (--displacement-table)")
    sig = np.asarray(data.sigma, dtype=float)
    if np.any(~np.isfinite(sig)) or np.any(sig <= 0):
        raise InputError("every profile sample needs a positive, finite sigma")
    half_width = float(np.max(np.abs(data.offset_px)))
    start = dict(start or {})
    values = {c: 0.0 for c in STRAIN_COMPONENTS}
    values.update(center_x=0.0, center_y=0.0, rotation=0.0)
    values.update({"ux_nm": 0.0, "uy_nm": 0.0, "decay_length_nm": thickness_nm / 5.0,
                   "scale": 1.0, "instrument_sigma_px": 1.0, "relaxed_fraction": 0.5})
    for k, v in start.items():
        values[k] = v / _STRAIN_UNIT if k in STRAIN_COMPONENTS else float(v)
    m = _Model(data, thickness_nm, model, table, instrument_sigma_px, n_slabs,
               {k: values[k] for k in hold})
    names = m.free

    def run(x0_values, fixed_extra, max_nfev):
        sub = _Model(data, thickness_nm, model, table, instrument_sigma_px, n_slabs,
                     {**m.fixed, **fixed_extra})
        x0 = np.array([x0_values[n] for n in sub.free])
        lo, hi = _bounds(sub.free, thickness_nm, half_width)
        room = 1e-9 * np.where(np.isfinite(hi - lo), hi - lo, 0.0)
        x0 = np.clip(x0, lo + room, hi - room)
        res = least_squares(sub.residuals, x0, jac=sub.jacobian, bounds=(lo, hi),
                            x_scale="jac", max_nfev=max_nfev, method="trf")
        out = dict(x0_values)
        out.update(zip(sub.free, res.x))
        return out, res, sub

    shape_names = list(PARAMETERS[model])
    # 0. each profile's position by a scan, then strain, centre and rotation from
    #    all positions by linear least squares: a start inside the right valley
    # 1. rigid positions and blur with the relaxation held at its start, from the
    #    given start and from the scan; the lower cost wins
    rigid_fixed = {n: values[n] for n in shape_names}
    starts = [values] + ([_rigid_start(m, values, half_width)] if scan else [])
    runs = [run(v0, rigid_fixed, 40) for v0 in starts]
    values = min(runs, key=lambda r: r[1].cost)[0]
    # 2. scan the surface displacement (cosh): its sign is not observable (the
    #    profile of a symmetric displacement field is unchanged by u -> -u)
    if model == "cosh" and scan and not {"ux_nm", "uy_nm"} & set(m.fixed):
        g_len = float(np.median(np.linalg.norm(data.g_frame[:, :2], axis=1)))
        best = (np.inf, values["ux_nm"], values["uy_nm"])
        cycles = np.array([0.1, 0.3, 0.6, 1.0, 1.6, 2.4])
        angles = np.radians(np.arange(0.0, 180.0, 22.5))
        amp = (cycles / (10.0 * g_len))[:, None]
        # no zero amplitude: the decay length would then be undefined
        ux, uy = (amp * np.cos(angles)).ravel(), (amp * np.sin(angles)).ravel()
        length = thickness_nm / 6.0
        for a, b in zip(ux, uy):
            trial = dict(values, ux_nm=a, uy_nm=b, decay_length_nm=length)
            cost = float(np.sum(m.residuals(np.array([trial[n] for n in names])) ** 2))
            if cost < best[0]:
                best = (cost, a, b)
        values.update(ux_nm=best[1], uy_nm=best[2], decay_length_nm=length)
    if model == "relaxed-strain" and scan and "relaxed_fraction" not in m.fixed:
        best = (np.inf, 0.5, thickness_nm / 6.0)
        for frac in (0.25, 0.5, 0.75, 1.0):
            for length in (thickness_nm / 12.0, thickness_nm / 6.0, thickness_nm / 3.0):
                trial = dict(values, relaxed_fraction=frac, decay_length_nm=length)
                cost = float(np.sum(m.residuals(np.array([trial[n] for n in names])) ** 2))
                if cost < best[0]:
                    best = (cost, frac, length)
        values.update(relaxed_fraction=best[1], decay_length_nm=best[2])
    # 3. everything together
    values, res, _ = run(values, {}, 200)
    x = np.array([values[n] for n in names])
    if model == "cosh" and (values["ux_nm"], values["uy_nm"]) < (0.0, 0.0):
        idx = [names.index(n) for n in ("ux_nm", "uy_nm") if n in names]
        x[idx] = -x[idx]
    r = m.residuals(x)
    chi2 = float(np.sum(r ** 2))
    dof = int(r.size - len(names) - 3 * len(data.intensity))
    jac = m.jacobian(x)
    scale = np.linalg.norm(jac, axis=0)
    if np.any(scale == 0):
        dead = [names[j] for j in np.flatnonzero(scale == 0)]
        raise InputError(f"degenerate fit: the profiles do not depend on {', '.join(dead)}; "
                         "hold it, or fit --model uniform when the lines show no relaxation")
    _, sv, vt = np.linalg.svd(jac / scale, full_matrices=False)
    cov = (vt.T / np.maximum(sv, 1e-300) ** 2) @ vt / np.outer(scale, scale)
    inflated = dof > 0 and chi2 > dof
    if inflated:
        cov = cov * (chi2 / dof)
    # per-profile position term: a neighbouring line's wing or a dynamical shift moves a
    # profile as a whole; the scatter of the profiles' own best shifts about the fitted
    # ones, against their statistical sigmas, scales the rigid parameters' covariance
    shift_ratio = _shift_scatter(m, x, 9 - sum(n in m.fixed for n in _RIGID))
    rigid_idx = [i for i, n in enumerate(names) if n in _RIGID]
    cov_stat = cov.copy()
    if shift_ratio > 1.0:
        cov[np.ix_(rigid_idx, rigid_idx)] *= shift_ratio ** 2
        off = [i for i in range(len(names)) if i not in rigid_idx]
        cov[np.ix_(rigid_idx, off)] *= shift_ratio
        cov[np.ix_(off, rigid_idx)] *= shift_ratio
    units = np.array([_STRAIN_UNIT if n in STRAIN_COMPONENTS else 1.0 for n in names])
    cov = cov * np.outer(units, units)
    cov_stat = cov_stat * np.outer(units, units)
    sigmas = np.sqrt(np.maximum(np.diag(cov), 0.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(sigmas, sigmas)
    v = m.full(x)
    intrinsic_ext = m.intrinsic(v)
    blurred = m.blur(v, intrinsic_ext)
    coef, _, _ = m.linear(blurred)
    design = m.design(blurred)
    fitted = np.einsum("pki,pi->pk", design, coef)
    uniform = coef[:, :1] + coef[:, 1:2] * data.offset_px - coef[:, 2:3] * m.blur(
        v, m.intrinsic(v, relax=False))
    success = bool(res.success) and np.all(np.isfinite(sigmas))
    message = res.message if success else f"the fit did not converge: {res.message}"
    return ProfileFit(model, names, x * units, sigmas, [PARAMETER_UNITS[n] for n in names],
                      cov, corr, chi2, dof, success, str(message), fitted, uniform,
                      coef, inflated, np.sqrt(np.maximum(np.diag(cov_stat), 0.0)),
                      float(shift_ratio))


def _minima(profile):
    """Resolved minima of a deficit profile (p, k): count per profile.

    A minimum counts when it is at least a quarter of the deepest one and
    the profile rises between neighbouring counted minima by at least a
    tenth of the deepest (so a flat-bottomed or shouldered dip counts once).
    """
    counts = np.zeros(len(profile), dtype=int)
    for i, y in enumerate(profile):   # a few dozen profiles, reporting only
        base = np.max(y)
        deficit = base - y
        top = deficit.max()
        if top <= 0:
            continue
        inner = np.flatnonzero((y[1:-1] < y[:-2]) & (y[1:-1] <= y[2:])) + 1
        inner = inner[deficit[inner] >= 0.25 * top]
        kept = []
        for j in inner:
            if kept and deficit[kept[-1]:j + 1].min() > min(deficit[kept[-1]], deficit[j]) \
                    - 0.1 * top:
                if deficit[j] > deficit[kept[-1]]:
                    kept[-1] = j
                continue
            kept.append(j)
        counts[i] = len(kept)
    return counts


def _fwhm(x, deficit):
    """Full width (units of x) of the region where a deficit exceeds half its maximum."""
    top = deficit.max(axis=-1, keepdims=True)
    above = deficit >= 0.5 * top
    first = np.argmax(above, axis=-1)
    last = above.shape[-1] - 1 - np.argmax(above[..., ::-1], axis=-1)
    return x[last] - x[first]


@dataclass
class RelaxationResult:
    """Outcome of :func:`relaxation`: mid-foil strain and relaxation through the foil."""

    structure: dict
    zone: tuple
    x_axis: tuple
    kv: float
    thickness_nm: float
    model: str
    fit: ProfileFit
    profiles: LineProfiles
    strain_mid: np.ndarray          # six components
    strain_mid_sigma: np.ndarray
    strain_mid_sigma_stat: np.ndarray
    average_strain: np.ndarray      # six components of the single-strain fit
    average_strain_sigma: np.ndarray
    detector: object                # the fitted detector
    split: np.ndarray               # (p,) bool per profile
    broadened: np.ndarray           # (p,) bool
    width_px: np.ndarray            # (p,) FWHM of the fitted profile
    uniform_width_px: np.ndarray    # (p,) FWHM of a uniform-strain line, same blur
    table: DisplacementTable | None = None
    warnings: list = field(default_factory=list)
    cautions: tuple = CAUTIONS

    @property
    def success(self):
        return self.fit.success

    @property
    def parameters(self):
        """Relaxation parameters: (names, values, sigmas, units)."""
        names = [n for n in self.fit.names if n in PARAMETERS[self.model]
                 or n == "instrument_sigma_px"]
        idx = [self.fit.names.index(n) for n in names]
        return (names, self.fit.values[idx], self.fit.sigmas[idx],
                [self.fit.units[i] for i in idx])

    def depth_profile(self, n=101):
        """The fitted relaxation against depth, with 1-sigma bands.

        Returns (z_nm (n,), curves (n, m), sigmas (n, m), labels): for the
        displacement families du/dz of the relaxation in the disk frame x and y
        (twice the tensor shears e_xz, e_yz added to the mid-foil strain); for
        ``relaxed-strain`` the strain at depth over the mid-foil strain.
        Uncertainties are propagated from the covariance by finite differences.
        """
        z = np.linspace(0.0, self.thickness_nm, n)
        shape = [nm for nm in self.fit.names if nm in PARAMETERS[self.model]]
        idx = [self.fit.names.index(nm) for nm in shape]
        if self.model == "relaxed-strain":
            labels = ["e(z) / e_mid"]

            def curves(vals):
                return relaxed_strain_fraction(vals[0], vals[1], z, self.thickness_nm)[:, None]
        else:
            labels = ["du_x/dz", "du_y/dz"]

            def curves(vals):
                u = relaxation_displacement(self.model, vals, z, self.thickness_nm, self.table)
                return np.gradient(u[:, :2], z, axis=0)

        base = np.asarray([self.fit.values[i] for i in idx], dtype=float)
        values = curves(base)
        if not idx:
            return z, values, np.zeros_like(values), labels
        cov = self.fit.covariance[np.ix_(idx, idx)]
        jac = []
        for k in range(len(idx)):
            h = 1e-4 * max(abs(base[k]), 1e-3 * self.thickness_nm if shape[k].endswith("_nm")
                           else 1e-3)
            step = base.copy()
            step[k] += h
            jac.append((curves(step) - values) / h)
        jac = np.stack(jac, axis=-1)                         # (n, m, q)
        var = np.einsum("nij,jk,nik->ni", jac, cov, jac)
        return z, values, np.sqrt(np.maximum(var, 0.0)), labels

    def to_dict(self):
        """The ``laueline.relaxation/1`` document."""
        names, values, sigmas, units = self.parameters
        p = self.profiles
        lines = []
        for i in range(len(p)):
            lines.append({
                "hkl": p.hkl[i].tolist(), "segment": int(p.segment[i]),
                "split": bool(self.split[i]), "broadened": bool(self.broadened[i]),
                "width_px": float(self.width_px[i]),
                "uniform_width_px": float(self.uniform_width_px[i]),
                "n_columns": int(p.n_columns[i]),
                "offset_px": p.offset_px.tolist(),
                "measured": p.intensity[i].tolist(), "sigma": p.sigma[i].tolist(),
                "fitted": self.fit.fitted[i].tolist(),
                "fitted_uniform": self.fit.uniform[i].tolist(),
                "background": float(self.fit.linear[i, 0]),
                "depth": float(self.fit.linear[i, 2]),
                "columns_px": p.columns_px[i][[0, -1]].tolist(),
            })
        z, curves, curve_sigma, labels = self.depth_profile(41)
        det = self.detector
        return {
            "schema": RELAXATION_SCHEMA,
            "structure": self.structure, "zone": list(self.zone), "x_axis": list(self.x_axis),
            "kv": self.kv, "thickness_nm": self.thickness_nm, "model": self.model,
            "displacement_table": None if self.table is None else self.table.source,
            "parameters": {"names": names, "values": values, "sigmas": sigmas,
                           "units": units},
            "strain_mid": {"frame": "reference-cartesian",
                           "components": list(STRAIN_COMPONENTS),
                           "values": self.strain_mid, "sigmas": self.strain_mid_sigma,
                           "sigmas_statistical": self.strain_mid_sigma_stat,
                           "position_scatter_ratio": self.fit.shift_ratio},
            "average_strain": {"values": self.average_strain,
                               "sigmas": self.average_strain_sigma},
            "detector": det.as_dict(),
            "fit_parameters": {"names": self.fit.names, "values": self.fit.values,
                               "sigmas": self.fit.sigmas, "units": self.fit.units},
            "correlation": self.fit.correlation,
            "depth_profile": {"z_nm": z, "quantities": labels, "values": curves.T,
                              "sigmas": curve_sigma.T, "frame": "disk (x, y, beam)"},
            "lines": lines,
            "n_split": int(np.sum(self.split)), "n_broadened": int(np.sum(self.broadened)),
            "chi2": self.fit.chi2, "dof": self.fit.dof,
            "uncertainties_scaled": bool(self.fit.inflated),
            "success": bool(self.success), "message": self.fit.message,
            "warnings": list(self.warnings), "cautions": list(self.cautions),
        }


def _default_half_width(thickness_nm, g_perp, scale_px_per_mrad, detected_fwhm_px=0.0):
    """Profile half-width (px): 2.5 line widths plus 2 px, within 8..40 px.

    The line width is the larger of the kinematic width of the median line
    (0.886 / t in s) and the median width the detector found.  Wider windows
    hold more of a split line but lose more columns to neighbouring lines.
    """
    fwhm_px = _SINC2_FWHM / (10.0 * thickness_nm) / np.median(g_perp) * 1e3 * scale_px_per_mrad
    return float(np.clip(2.5 * max(fwhm_px, detected_fwhm_px) + 2.0, 8.0, 40.0))


def profile_data(profiles, crystal, zone, x_axis, wave_number, detector):
    """The :class:`ProfileData` of measured profiles through the one forward model.

    Every sample pixel is mapped to the disk (``detector``) and to the
    excitation error of its reflection in the unstrained reference crystal
    at ``wave_number`` (:func:`excitation_errors`); the column average gives
    s across the profile, fitted by a straight line in the offset.  The
    shifts per strain component and per detector parameter are taken at
    the profile's mean locus point.
    """
    from .frame import zone_frame
    from .lines import line_parameters

    frame = zone_frame(crystal.basis, zone, x_axis)
    hkl = profiles.hkl
    lp = line_parameters(crystal.g_vectors(hkl), frame, wave_number)
    d = profiles.offset_px
    n_col = max(len(c) for c in profiles.columns_px)
    # pad the column lists to one array (repeating the last column; weights drop them)
    cols = np.stack([np.concatenate([c, np.repeat(c[-1:], n_col - len(c), 0)])
                     for c in profiles.columns_px])
    nrm = np.stack([np.concatenate([c, np.repeat(c[-1:], n_col - len(c), 0)])
                    for c in profiles.normals])
    weight = np.stack([np.arange(n_col) < len(c) for c in profiles.columns_px]).astype(float)
    weight /= weight.sum(axis=1, keepdims=True)
    # the samples that entered each offset's average, as weights (p, c, k)
    sample_w = np.zeros((len(hkl), n_col, len(d)))
    for i, mask in enumerate(profiles.masks):
        sample_w[i, :len(mask)] = mask
    sample_w /= np.maximum(sample_w.sum(axis=1, keepdims=True), 1.0)
    pix = cols[:, :, None, :] + d[None, None, :, None] * nrm[:, :, None, :]   # (p, c, k, 2)

    def mean_s(det):
        s = excitation_errors(det.to_mrad(pix), lp)                        # (p, c, k)
        return np.einsum("pck,pck->pk", s, sample_w)

    s = mean_s(detector)
    design = np.stack([np.ones_like(d), d], axis=1)
    coef = np.linalg.lstsq(design, s.T, rcond=None)[0].T                  # (p, 2)
    dc = 0.05
    cx, cy = detector.center_px
    shifts = [(mean_s(detector.replace(center_px=(cx + dc, cy))) - s) / dc,
              (mean_s(detector.replace(center_px=(cx, cy + dc))) - s) / dc,
              (mean_s(detector.replace(rotation_deg=detector.rotation_deg + 0.01)) - s) / 0.01]
    det_shift = np.stack([sh.mean(axis=1) for sh in shifts], axis=1)
    t_mid = detector.to_mrad(np.einsum("pc,pcj->pj", weight, cols))
    strain = strain_shifts(crystal.basis, zone, x_axis, wave_number, hkl, t_mid)
    g_frame = np.concatenate([lp.g_perp, lp.gz[:, None]], axis=1)
    return ProfileData(d, profiles.intensity, profiles.sigma, coef, strain, det_shift, g_frame)


def relaxation(crystal, zone, image, *, calibration, thickness_nm, model="cosh", table=None,
               x_axis=None, min_strength=0.1, half_width_px=None, segments=2,
               instrument_sigma_px=None, detection=None, disk_px=None, min_significance=5.0):
    """Mid-foil strain and relaxation profile of a thin lamella from one pattern.

    Steps: detect the lines (:func:`laueline.images.detect.detect_lines`);
    fit one strain to them with the calibration held
    (:func:`laueline.refine.refine_image`), which gives the pattern centre,
    rotation and start strain (when that strain is imprecise, as split lines
    often make it, the reference cell's loci are used instead); measure the
    profile across every predicted line along its exact locus, in stretches
    (:func:`measure_line_profiles`), leaving out those too weak; fit the
    mid-foil strain, the pattern centre and rotation, the relaxation
    parameters and the instrument blur to all profiles at once
    (:func:`fit_profiles`); then measure and fit once more along the loci of
    the fitted mid-foil strain, so that no locus runs askew to its line.

    Parameters
    ----------
    crystal : Crystal
        The unstrained reference.
    zone : sequence of 3 int
    image : ndarray (rows, cols)
    calibration : (kv, Detector)
        From a reference fit (:func:`laueline.refine.calibration_from_document`);
        the voltage and the scale are held.
    thickness_nm : float
        Foil thickness (for example from :mod:`laueline.thickness`).
    model : {'uniform', 'cosh', 'table'}
    table : DisplacementTable or path, for ``model='table'``
    x_axis : sequence of 3 int, optional
    min_strength : float
        Weaker predicted lines are neither profiled nor kept clear of.
    half_width_px : float, optional
        Half-width of each profile; by default three kinematic line widths
        of the broadest line plus 4 px, within 8..40 px.
    segments : int
        Profiles per line (stretches along it).
    instrument_sigma_px : float, optional
        Gaussian blur of a line by the instrument (detector, energy spread),
        px; fitted when not given.
    detection : laueline.images.detect.Detection, optional
    disk_px : (x, y, r), optional
    min_significance : float
        Profiles whose dip is less significant than this (depth over its
        sigma) are left out as too weak.

    Returns
    -------
    RelaxationResult
    """
    from .images.detect import detect_lines

    thickness_nm = _check_thickness(thickness_nm)
    if model not in MODELS:
        raise InputError(f"unknown relaxation model '{model}'; choose one of {', '.join(MODELS)}")
    if model == "table":
        if table is None:
            raise InputError("model 'table' needs a displacement table (--displacement-table)")
        if not isinstance(table, DisplacementTable):
            table = read_displacement_table(table, thickness_nm)
    if calibration is None:
        raise InputError("a calibration (voltage and camera scale from a reference) is needed")
    if int(segments) < 1:
        raise InputError(f"segments must be at least 1, got {segments}")
    for name, value in (("half_width_px", half_width_px),
                        ("instrument_sigma_px", instrument_sigma_px)):
        if value is not None and not (math.isfinite(value) and value > 0):
            raise InputError(f"{name} must be positive, got {value:g}")
    image = np.asarray(image, dtype=float)
    if detection is None:
        detection = detect_lines(image, disk=disk_px)
    kv, cal_det = calibration
    warnings = []
    single, avg = _average_fit(crystal, zone, detection, kv, calibration, x_axis,
                               min_strength, warnings)
    start = {c: avg.parameter(c)[0] for c in STRAIN_COMPONENTS if c in avg.parameters}
    strain = [start.get(c, 0.0) for c in STRAIN_COMPONENTS]
    widths = [detection.lines[i].width_px for i in detection.good_lines]
    settings = dict(image=image, crystal=crystal, zone=avg.zone, x_axis=avg.x_axis, kv=kv,
                    wave_number=avg.wave_number, disk=detection.disk,
                    min_strength=min_strength, segments=segments,
                    min_significance=min_significance, thickness_nm=thickness_nm,
                    model=model, table=table, instrument_sigma_px=instrument_sigma_px,
                    detected_fwhm_px=float(np.median(widths)) if widths else 0.0)
    # first pass along the loci of the single-strain fit; second pass along the loci
    # of the first pass's mid-foil strain (a locus askew to its line smears the
    # column average)
    profiles, fit, det, half = _profile_pass(avg.detector, strain, start, half_width_px, True,
                                             warnings, **settings)
    v = dict(zip(fit.names, fit.values))
    strain = [v[c] for c in STRAIN_COMPONENTS]
    if max(abs(e) for e in strain) < _PLAUSIBLE_STRAIN:
        det = det.replace(center_px=(det.center_px[0] + v["center_x"],
                                     det.center_px[1] + v["center_y"]),
                          rotation_deg=det.rotation_deg + v["rotation"])
        again = {k: val for k, val in v.items() if k not in ("center_x", "center_y", "rotation")}
        pass_warnings = []
        profiles, fit, det, half = _profile_pass(det, strain, again, half, False,
                                                 pass_warnings, **settings)
        warnings = [w for w in warnings if "too weak" not in w] + pass_warnings
    strain_idx = [fit.names.index(c) for c in STRAIN_COMPONENTS]
    avg_strain = np.array([single.parameter(c)[0] if single is not None
                           and c in single.parameters else np.nan for c in STRAIN_COMPONENTS])
    avg_sigma = np.array([single.parameter(c)[1] if single is not None
                          and c in single.parameters else np.nan for c in STRAIN_COMPONENTS])
    v = dict(zip(fit.names, fit.values))
    fitted_det = det.replace(center_px=(det.center_px[0] + v["center_x"],
                                        det.center_px[1] + v["center_y"]),
                             rotation_deg=det.rotation_deg + v["rotation"])
    lo, hi = _bounds(fit.names, thickness_nm, float(np.max(np.abs(profiles.offset_px))))
    at_bound = [n for n, v, a, b in zip(fit.names, fit.values, lo, hi)
                if np.isfinite(a) and (v <= a + 1e-6 * (b - a) or v >= b - 1e-6 * (b - a))]
    if at_bound:
        warnings.append(f"{', '.join(at_bound)} ended at the edge of the allowed range: the "
                        "model hardly describes these profiles")
    if fit.dof > 0 and fit.chi2 / fit.dof > _PLAUSIBLE_CHI2_PER_DOF:
        fit.success = False
        fit.message = (f"implausible: chi-square per degree of freedom {fit.chi2 / fit.dof:.1f} "
                       f"(above {_PLAUSIBLE_CHI2_PER_DOF:g}): the {model} model does not "
                       "describe these profiles; try another --model")
    if np.max(np.abs(fit.values[strain_idx])) >= _PLAUSIBLE_STRAIN:
        fit.success = False
        fit.message = (f"implausible: a mid-foil strain component of "
                       f"{np.max(np.abs(fit.values[strain_idx])):.3g} (beyond "
                       f"{_PLAUSIBLE_STRAIN:g}); the lines were probably misassigned")
    width = _fwhm(profiles.offset_px, fit.linear[:, :1] - fit.fitted)
    width_uniform = _fwhm(profiles.offset_px, fit.linear[:, :1] - fit.uniform)
    split = _minima(fit.fitted) >= 2
    broadened = width > 1.25 * width_uniform
    if not fit.success:
        warnings.append(fit.message)
    if fit.shift_ratio > 1.0:
        warnings.append(f"the profiles' positions scatter {fit.shift_ratio:.2f} times more than "
                        "their noise allows (neighbouring lines, dynamical shifts): strain, "
                        "centre and rotation uncertainties scaled up by that factor")
    if fit.inflated:
        warnings.append(f"chi-square {fit.chi2:.1f} for {fit.dof} degrees of freedom: "
                        "uncertainties scaled up by "
                        f"{math.sqrt(fit.chi2 / fit.dof):.2f}")
    for i, j in zip(*np.triu_indices(len(fit.names), 1)):
        if abs(fit.correlation[i, j]) > 0.95:
            warnings.append(f"{fit.names[i]} and {fit.names[j]} are correlated "
                            f"({fit.correlation[i, j]:+.3f}): poorly separated")
    result = RelaxationResult(
        structure=crystal.summary(), zone=avg.zone, x_axis=avg.x_axis, kv=float(kv),
        thickness_nm=thickness_nm, model=model, fit=fit, profiles=profiles,
        strain_mid=fit.values[strain_idx], strain_mid_sigma=fit.sigmas[strain_idx],
        strain_mid_sigma_stat=fit.sigmas_stat[strain_idx],
        average_strain=avg_strain, average_strain_sigma=avg_sigma, detector=fitted_det,
        split=split, broadened=broadened, width_px=width, uniform_width_px=width_uniform,
        table=table, warnings=warnings)
    return result


_PLAUSIBLE_STRAIN = 0.02   # beyond 2 % a single HOLZ pattern's kinematic fit is not credible
# the profiles' own scatter sets their sigmas, so a right model gives chi2/dof near 1;
# dynamical effects add a little; five times that is a wrong model (common practice)
_PLAUSIBLE_CHI2_PER_DOF = 5.0


def _profile_pass(detector, strain, start, half_width_px, scan, warnings, *, image, crystal,
                  zone, x_axis, kv, wave_number, disk, min_strength, segments,
                  min_significance, thickness_nm, model, table, instrument_sigma_px,
                  detected_fwhm_px):
    """Profiles along the loci predicted for ``strain`` and ``detector``, and their fit."""
    from .lines import predict

    pattern = predict(crystal, zone, kv, disk.radius_px / detector.scale_px_per_mrad,
                      x_axis=x_axis, min_strength=min_strength, strain=strain,
                      wave_number=wave_number)
    # every predicted line is profiled along its locus, found by the detector or not:
    # broad or split lines are often missed, and the weak ones are sorted out below
    loci = detector.to_pixels(pattern.points_mrad)
    if half_width_px is None:
        g_perp = np.linalg.norm(pattern.frame.components(
            crystal.g_vectors(pattern.hkl))[:, :2], axis=1)
        half_width_px = _default_half_width(thickness_nm, g_perp, detector.scale_px_per_mrad,
                                            detected_fwhm_px)
    profiles = measure_line_profiles(
        image, list(loci), pattern.hkl, disk.center_px, disk.radius_px,
        half_width_px=half_width_px, segments=segments, obstacles_px=list(loci))
    if len(profiles):
        flank = np.abs(profiles.offset_px) >= 0.75 * half_width_px
        depth = profiles.intensity[:, flank].mean(axis=1) - profiles.intensity.min(axis=1)
        noise = np.median(profiles.sigma, axis=1)
        strong = depth > min_significance * noise
        if np.any(~strong):
            weak = {" ".join(map(str, h)) for h in profiles.hkl[~strong].tolist()}
            warnings.append(f"{int(np.sum(~strong))} profile(s) too weak to use "
                            f"(lines {', '.join(sorted(weak))})")
        profiles = _subset(profiles, strong)
    n_lines = len({tuple(h) for h in profiles.hkl.tolist()})
    if n_lines < 3:
        raise InputError(f"only {n_lines} line(s) are strong and clear enough to profile "
                         "(at least 3 are needed): the lines are too weak, too crowded, or "
                         "the profile window (half_width_px) is too wide")
    n_free = 9 + len(PARAMETERS[model]) + (instrument_sigma_px is None)
    if len(profiles) < n_free + 1:
        raise InputError(f"only {len(profiles)} profiles from {n_lines} lines for {n_free} "
                         "parameters: too few lines are strong and clear enough; try more "
                         "segments, a narrower half_width_px or a lower min_strength")
    data = profile_data(profiles, crystal, zone, x_axis, wave_number, detector)
    fit = fit_profiles(data, thickness_nm, model, table=table, start=start,
                       instrument_sigma_px=instrument_sigma_px, scan=scan)
    return profiles, fit, detector, half_width_px


def _average_fit(crystal, zone, detection, kv, calibration, x_axis, min_strength, warnings):
    """One strain for the whole pattern, and the fit whose loci the profiles follow.

    Returns (single-strain fit or None, fit giving centre, rotation and start
    strain).  Split and broadened lines often leave a single-strain fit
    imprecise; unless its strain is good to 1e-3, the profiles start from the
    loci of the reference cell (centre and rotation fitted), which lie within
    a few pixels of lines strained by a few 1e-3.
    """
    from .refine import refine_image

    avg = None
    try:
        avg = refine_image(crystal, zone, detection, kv=kv, calibration=calibration,
                           x_axis=x_axis, min_strength=min_strength)
        values = [avg.parameter(c) for c in STRAIN_COMPONENTS if c in avg.parameters]
        if (avg.converged and max(abs(v) for v, _ in values) < _PLAUSIBLE_STRAIN / 4
                and max(s for _, s in values) < 1e-3):
            return avg, avg
    except InputError:
        pass
    warnings.append("the single-strain fit of the detected lines is imprecise or failed; "
                    "the profiles start from the loci of the reference cell")
    return avg, refine_image(crystal, zone, detection, kv=kv, calibration=calibration,
                             x_axis=x_axis, min_strength=min_strength, model="fixed")


def _subset(profiles, mask):
    idx = np.flatnonzero(mask)
    return LineProfiles(profiles.hkl[idx], profiles.segment[idx], profiles.offset_px,
                        profiles.intensity[idx], profiles.sigma[idx],
                        [profiles.columns_px[i] for i in idx],
                        [profiles.normals[i] for i in idx], profiles.n_columns[idx],
                        [profiles.masks[i] for i in idx])


# ---------------------------------------------------------------------------
# split and broadened lines, for the single-strain fit
# ---------------------------------------------------------------------------

@dataclass
class LineAssessment:
    """Shape of one detected line's profile.

    ``width_px`` is the FWHM of a single Gaussian dip fitted to the
    profile; ``split`` is True when two dips fit significantly better
    (chi-square lower by ``delta_chi2``), are both substantial and lie
    further apart than the instrument's line width; ``broadened`` when the
    single dip is wider than 1.5 times the instrument's line width.
    """

    index: int
    width_px: float
    split: bool
    broadened: bool
    separation_px: float
    delta_chi2: float


def _dips(d, y, sigma, n_dips, start_width, start_centres):
    from scipy.optimize import least_squares

    def model(p):
        out = p[0] + p[1] * d
        for j in range(n_dips):
            out = out - p[3 + 2 * j] * np.exp(-0.5 * ((d - p[4 + 2 * j]) / p[2]) ** 2)
        return out

    depth0 = max(float(np.max(y) - np.min(y)), 1e-3)
    x0 = [float(np.median(y)), 0.0, start_width]
    for c in start_centres:
        x0 += [depth0 / n_dips, c]
    lo = [-np.inf, -np.inf, 0.3] + [0.0, d[0]] * n_dips
    hi = [np.inf, np.inf, d[-1] - d[0]] + [np.inf, d[-1]] * n_dips
    res = least_squares(lambda p: (model(p) - y) / sigma, np.clip(x0, lo, hi),
                        bounds=(lo, hi), max_nfev=200)
    return res.x, float(np.sum(res.fun ** 2))


def assess_line_profiles(image, detection, *, instrument_fwhm_px=None, half_width_px=None,
                         min_delta_chi2=25.0):
    """Which detected lines are split or broadened beyond the instrument's line width.

    Each good line of ``detection`` (:func:`laueline.images.detect.detect_lines`)
    is profiled across its fitted position, averaged along its length
    (:func:`measure_line_profiles`, keeping clear of the other lines); one
    and two Gaussian dips (one common width) are fitted to the profile.

    Parameters
    ----------
    image : ndarray (rows, cols)
    detection : Detection
    instrument_fwhm_px : float, optional
        The width of an unbroadened line (a thick, unstrained reference
        region, or the instrument's resolution); by default the median width
        the detection found, which presumes that most lines are not broadened.
    half_width_px : float, optional
        Profile half-width; four instrument widths by default (at least 8 px).
    min_delta_chi2 : float
        Chi-square improvement a second dip must bring (25: about five
        sigma for the extra parameters; common practice).

    Returns
    -------
    list of LineAssessment
        One per good line, in detection order.
    """
    good = detection.good_lines
    if not good:
        return []
    fwhm = instrument_fwhm_px or float(np.median([detection.lines[i].width_px for i in good]))
    w = half_width_px or max(4.0 * fwhm, 8.0)
    polylines = [np.asarray(detection.lines[i].points_px, dtype=float) for i in good]
    profiles = measure_line_profiles(
        image, polylines, np.array(good)[:, None].repeat(3, 1), detection.disk.center_px,
        detection.disk.radius_px, half_width_px=w, segments=1, obstacles_px=polylines,
        clearance_px=max(1.5 * fwhm, 3.0))
    out = []
    d = profiles.offset_px
    sigma0 = fwhm / _FWHM
    for k in range(len(profiles)):     # a few dozen small fits, reporting only
        y, s = profiles.intensity[k], np.maximum(profiles.sigma[k], 1e-9)
        one, chi1 = _dips(d, y, s, 1, sigma0, [d[np.argmin(y)]])
        width = one[2] * _FWHM
        best = (np.inf, None)
        for sep in (0.75, 1.25, 2.0):
            c = one[4]
            two, chi2 = _dips(d, y, s, 2, sigma0, [c - sep * width / 2, c + sep * width / 2])
            if chi2 < best[0]:
                best = (chi2, two)
        chi2, two = best
        depths = two[[3, 5]]
        separation = abs(two[6] - two[4])
        split = bool(chi1 - chi2 > min_delta_chi2 and depths.min() > 0.2 * depths.max()
                     and separation > fwhm)
        out.append(LineAssessment(int(profiles.hkl[k, 0]), float(width), split,
                                  bool(width > 1.5 * fwhm),
                                  float(separation) if split else float("nan"),
                                  float(chi1 - chi2)))
    return out


def line_shape_warning(assessments):
    """One warning sentence for a single-strain fit when lines are split or broadened, or None."""
    n_split = sum(a.split for a in assessments)
    n_broad = sum(a.broadened and not a.split for a in assessments)
    if not n_split and not n_broad:
        return None
    return (f"{n_split} of {len(assessments)} lines are split and {n_broad} broadened beyond "
            "the instrument's line width: the strain varies through the foil (surface "
            "relaxation of a thin lamella?), and one strain per pattern is an average that "
            "may match no depth; fit the profiles with 'laueline relaxation'")


def relaxation_text(result):
    """Plain-text summary of a :class:`RelaxationResult`."""
    out = [f"thin-lamella profile fit: {result.structure.get('name', '')} "
           f"[{' '.join(map(str, result.zone))}], {result.kv:g} kV, t = "
           f"{result.thickness_nm:g} nm, model {result.model}"
           + (f" ({result.table.source})" if result.table is not None else "")]
    n_lines = len({tuple(h) for h in result.profiles.hkl.tolist()})
    out.append(f"profiles: {len(result.profiles)} from {n_lines} lines; split "
               f"{int(np.sum(result.split))}, broadened {int(np.sum(result.broadened))}")
    out.append("")
    out.append(f"{'strain (crystal frame)':24} {'mid-foil':>12} {'sigma':>10} "
               f"{'one-strain fit':>15} {'sigma':>10}")
    for c, v, s, a, sa in zip(STRAIN_COMPONENTS, result.strain_mid, result.strain_mid_sigma,
                              result.average_strain, result.average_strain_sigma):
        out.append(f"{c:24} {v:12.3e} {s:10.1e} {a:15.3e} {sa:10.1e}")
    out.append("")
    names, values, sigmas, units = result.parameters
    for n, v, s, u in zip(names, values, sigmas, units):
        out.append(f"{n:24} {v:12.5g} {s:10.2g} {u}")
    out.append("")
    out.append(f"chi-square {result.fit.chi2:.1f} for {result.fit.dof} degrees of freedom; "
               f"{'converged' if result.success else 'NOT converged'}: {result.fit.message}")
    if result.model == "cosh":
        out.append("the sign of (ux, uy) is not determined by the profiles (u and -u give the "
                   "same profile); reported with ux >= 0")
    for w in result.warnings:
        out.append(f"warning: {w}")
    for c in result.cautions:
        out.append(f"caution: {c}")
    return "\n".join(out)
