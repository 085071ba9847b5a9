"""Foil thickness from two-beam CBED (Kossel-Moellenstedt) fringes.

In a two-beam condition the diffracted disk shows dark fringes where the
two-beam rocking curve vanishes, t sqrt(s^2 + 1/xi_g^2) = n for integers n
(Hirsch, Howie, Nicholson, Pashley and Whelan, *Electron Microscopy of Thin
Crystals*, 1965).  With the deviation parameter s_i of fringe i and its
integer n_k = j + i - 1,

    (s_i / n_k)^2 = 1 / t^2 - (1 / xi_g^2) (1 / n_k^2),

a straight line in (1/n_k^2, (s_i/n_k)^2) with intercept 1/t^2 and slope
-1/xi_g^2 (Kelly, Jostsons, Blake and Napier, Phys. Status Solidi A 31
(1975) 771; Allen, Phil. Mag. A 43 (1981) 325).  The first index j is the
smallest integer above t / xi_g; it is found by trying successive integers
and keeping the straightest line with physical signs (positive intercept,
negative slope).

The deviation parameter of a fringe at distance x from the Bragg position
in the diffracted disk, with the disk separation L (the 2 theta_B distance),
is s = lambda x / (d^2 L) (small angles; Williams and Carter, *Transmission
Electron Microscopy*, 2009, ch. 20).  Distances x and L may be in any one
unit (pixels, mm on a print).

Units here: lengths of the foil in nm, s in 1/nm.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError
from .limits import check_inputs
from .optics import relativistic_factor, wavelength_A

__all__ = ["ThicknessResult", "thickness_from_fringes", "kinematic_extinction_distance_nm",
           "ProfileDetection", "detect_profile", "read_profile", "two_beam_intensity"]

_MAX_FIRST_INDEX = 12


def kinematic_extinction_distance_nm(crystal, hkl, kv):
    """Two-beam extinction distance xi_g = pi V cos(theta_B) / (lambda gamma |F_g|), nm.

    F_g is the kinematic electron structure factor (angstrom, Debye-Waller
    included) and gamma the relativistic factor (Williams and Carter 2009,
    ch. 13; Hirsch et al. 1965).
    """
    hkl = np.asarray(hkl, dtype=int).reshape(1, 3)
    if crystal.is_absent(hkl)[0]:
        raise InputError(f"({' '.join(map(str, hkl[0]))}) is systematically absent in "
                         f"{crystal.space_group_symbol}: no two-beam condition")
    f = abs(crystal.structure_factors(hkl)[0])
    if f < 1e-9:
        raise InputError(f"({' '.join(map(str, hkl[0]))}) has a vanishing structure factor")
    lam = wavelength_A(kv)
    d = float(crystal.d_spacing(hkl)[0])
    theta = math.asin(lam / (2 * d))
    xi_A = math.pi * crystal.volume * math.cos(theta) / (lam * relativistic_factor(kv) * f)
    return xi_A / 10.0


def two_beam_intensity(s_inv_nm, thickness_nm, extinction_nm):
    """Diffracted two-beam intensity (Hirsch et al. 1965, no absorption).

    I_g = (pi t / xi)^2 sin^2(pi t s_eff) / (pi t s_eff)^2, s_eff = sqrt(s^2 + 1/xi^2).
    """
    s = np.asarray(s_inv_nm, dtype=float)
    s_eff = np.sqrt(s * s + 1.0 / extinction_nm ** 2)
    return np.sin(np.pi * thickness_nm * s_eff) ** 2 / (extinction_nm * s_eff) ** 2


@dataclass
class Candidate:
    first_fringe_index: int
    residual: float
    thickness_nm: float
    extinction_distance_nm: float
    physical: bool


@dataclass
class ThicknessResult:
    """Thickness and extinction distance from a two-beam fringe series.

    ``residual`` of a candidate is 1 - R^2 of its straight-line fit (0 for a
    perfect line, scale free so that numberings can be compared).
    """

    thickness_nm: float
    thickness_sigma_nm: float
    extinction_distance_nm: float
    extinction_distance_sigma_nm: float
    first_fringe_index: int
    fringe_indices: np.ndarray
    deviations_inv_nm: np.ndarray
    deviations_sigma_inv_nm: np.ndarray | None
    line_x: np.ndarray
    line_y: np.ndarray
    intercept: float
    slope: float
    candidates: list
    kinematic_extinction_distance_nm: float | None
    d_spacing_A: float
    kv: float
    wavelength_A: float
    bragg_angle_mrad: float
    separation: float
    fringes: np.ndarray
    hkl: tuple | None = None
    profile: object = None
    warnings: list = field(default_factory=list)


def _line_fit(x, y, sigma_y=None):
    """Straight line y = a + b x; returns (a, b, cov, 1 - R^2)."""
    w = np.ones_like(y) if sigma_y is None else 1.0 / sigma_y ** 2
    design = np.stack([np.ones_like(x), x], axis=1)
    normal = design.T @ (design * w[:, None])
    coef = np.linalg.solve(normal, design.T @ (w * y))
    resid = y - design @ coef
    dof = len(y) - 2
    cov = np.linalg.inv(normal)
    if sigma_y is None:
        cov = cov * (np.sum(resid ** 2) / dof if dof > 0 else 0.0)
    ss_tot = np.sum(w * (y - np.average(y, weights=w)) ** 2)
    non_linearity = float(np.sum(w * resid ** 2) / ss_tot) if ss_tot > 0 else 0.0
    return coef[0], coef[1], cov, non_linearity


def thickness_from_fringes(fringes, separation, *, kv=200.0, d_spacing_A=None, crystal=None,
                           hkl=None, fringes_sigma=None, separation_sigma=None,
                           first_fringe_index=None):
    """Thickness and extinction distance from dark-fringe positions.

    Parameters
    ----------
    fringes : sequence of float
        Distances from the Bragg position in the diffracted disk to each
        successive dark fringe, increasing (any length unit).
    separation : float
        Distance between the direct and diffracted disk centres (2 theta_B),
        same unit.
    kv : float
        Accelerating voltage.
    d_spacing_A : float, optional
        Interplanar spacing; else from ``crystal`` and ``hkl``.
    crystal, hkl : optional
        Structure and reflection; also give the kinematic extinction distance.
    fringes_sigma, separation_sigma : optional
        Standard uncertainties of the positions (same unit), propagated.
    first_fringe_index : int, optional
        Force the index of the first fringe instead of searching.

    Returns
    -------
    ThicknessResult
    """
    check_inputs(kv=kv, d_spacing_A=d_spacing_A, first_fringe_index=first_fringe_index,
                 fringes_sigma=fringes_sigma, separation_sigma=separation_sigma)
    x = np.asarray(fringes, dtype=float).ravel()
    if len(x) < 2:
        raise InputError("at least two fringes are needed (three or more to choose the "
                         "numbering)")
    if not np.all(np.isfinite(x)) or np.any(x <= 0):
        raise InputError("fringe distances must be positive numbers")
    if np.any(np.diff(x) <= 0):
        raise InputError("fringe distances must increase from the Bragg position outward")
    separation = float(separation)
    if not math.isfinite(separation) or separation <= 0:
        raise InputError("the disk separation must be positive")
    kinematic = None
    if d_spacing_A is None:
        if crystal is None or hkl is None:
            raise InputError("give the reflection (structure and --hkl) or --d-spacing-A")
        hkl_arr = np.asarray(hkl, dtype=int)
        if not np.any(hkl_arr):
            raise InputError("the reflection 0 0 0 has no d-spacing")
        d_spacing_A = float(crystal.d_spacing(hkl_arr.reshape(1, 3))[0])
        kinematic = kinematic_extinction_distance_nm(crystal, hkl_arr, kv)
    d_spacing_A = float(d_spacing_A)
    if not math.isfinite(d_spacing_A) or d_spacing_A <= 0:
        raise InputError("the d-spacing must be positive")
    lam = wavelength_A(kv)
    theta = math.asin(lam / (2 * d_spacing_A))
    d_nm, lam_nm = d_spacing_A / 10, lam / 10
    s = lam_nm * x / (d_nm ** 2 * separation)
    s_sigma = None
    if fringes_sigma is not None or separation_sigma is not None:
        fs = np.broadcast_to(np.asarray(fringes_sigma if fringes_sigma is not None else 0.0,
                                        dtype=float), x.shape)
        ls = float(separation_sigma or 0.0)
        s_sigma = s * np.sqrt((fs / x) ** 2 + (ls / separation) ** 2)

    warnings = []
    candidates = []
    starts = [first_fringe_index] if first_fringe_index else range(1, _MAX_FIRST_INDEX + 1)
    for j in starts:
        n = j + np.arange(len(x))
        lx, ly = 1.0 / n ** 2, (s / n) ** 2
        sy = None if s_sigma is None else 2 * s * s_sigma / n ** 2
        a, b, _, nl = _line_fit(lx, ly, sy)
        physical = a > 0 and b < 0
        candidates.append(Candidate(int(j), nl, 1 / math.sqrt(a) if a > 0 else float("nan"),
                                    1 / math.sqrt(-b) if b < 0 else float("nan"), physical))
    physical = [c for c in candidates if c.physical]
    if not physical:
        raise InputError("no numbering of the fringes gives a straight line with positive "
                         "intercept and negative slope: check the fringe distances and the "
                         "separation")
    if len(x) == 2:
        # two points make a straight line for every numbering
        if kinematic is not None:
            best = min(physical, key=lambda c: abs(c.extinction_distance_nm - kinematic))
            warnings.append("only two fringes: every numbering fits a straight line; the one "
                            "whose extinction distance is nearest the kinematic value was "
                            "taken (measure a third fringe to decide)")
        else:
            best = physical[0]
            warnings.append("only two fringes: every numbering fits a straight line and none "
                            "can be preferred; the smallest first index was taken (measure a "
                            "third fringe)")
    else:
        best = min(physical, key=lambda c: c.residual)
        rivals = [c for c in physical if c is not best and c.residual <= 2 * best.residual
                  + 1e-12]
        if rivals:
            r = rivals[0]
            warnings.append(
                f"numberings starting at {best.first_fringe_index} and {r.first_fringe_index} "
                f"fit about equally well (residuals {best.residual:.2g}, {r.residual:.2g}): "
                f"thickness {best.thickness_nm:.1f} or {r.thickness_nm:.1f} nm")
    j = best.first_fringe_index
    n = j + np.arange(len(x))
    lx, ly = 1.0 / n ** 2, (s / n) ** 2
    sy = None if s_sigma is None else 2 * s * s_sigma / n ** 2
    a, b, cov, _ = _line_fit(lx, ly, sy)
    t = 1 / math.sqrt(a)
    xi = 1 / math.sqrt(-b)
    t_sigma = 0.5 * math.sqrt(cov[0, 0]) * a ** -1.5
    xi_sigma = 0.5 * math.sqrt(cov[1, 1]) * (-b) ** -1.5
    if s_sigma is not None and separation_sigma:
        # the separation scales every s alike: add its effect, which the line fit
        # of independent points does not see (t and xi both scale as L)
        rel = float(separation_sigma) / separation
        t_sigma = math.hypot(t_sigma, t * rel)
        xi_sigma = math.hypot(xi_sigma, xi * rel)
    if len(x) == 2 and s_sigma is None:
        warnings.append("two fringes leave no degrees of freedom: no uncertainty can be "
                        "estimated without position uncertainties")
        t_sigma = xi_sigma = float("nan")
    if kinematic is not None and abs(xi - kinematic) > 0.3 * kinematic:
        warnings.append(f"the measured extinction distance {xi:.1f} nm differs from the "
                        f"kinematic two-beam value {kinematic:.1f} nm by more than 30 %: "
                        "wrong reflection, or strong many-beam effects")
    if t / xi > 0 and j != math.floor(t / xi) + 1:
        warnings.append(f"the chosen first index {j} is not the integer just above "
                        f"t/xi = {t / xi:.2f}: the numbering is doubtful")
    return ThicknessResult(
        thickness_nm=t, thickness_sigma_nm=t_sigma, extinction_distance_nm=xi,
        extinction_distance_sigma_nm=xi_sigma, first_fringe_index=j, fringe_indices=n,
        deviations_inv_nm=s, deviations_sigma_inv_nm=s_sigma, line_x=lx, line_y=ly,
        intercept=a, slope=b, candidates=candidates, kinematic_extinction_distance_nm=kinematic,
        d_spacing_A=d_spacing_A, kv=float(kv), wavelength_A=lam, bragg_angle_mrad=theta * 1e3,
        separation=separation, fringes=x, hkl=None if hkl is None else tuple(int(v) for v in hkl),
        warnings=warnings)


# ---------------------------------------------------------------------------
# intensity profiles
# ---------------------------------------------------------------------------

def read_profile(path):
    """Two columns (position, intensity), optional header row, '#' comments."""
    import csv

    try:
        text = open(path, encoding="utf-8-sig").read()
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}") from None
    rows = [r for r in csv.reader(ln for ln in text.splitlines()
                                  if ln.strip() and not ln.lstrip().startswith("#"))]
    if rows:
        try:
            float(rows[0][0])
        except (ValueError, IndexError):
            rows = rows[1:]
    if len(rows) < 10:
        raise InputError(f"{path}: a profile needs at least 10 rows of position, intensity")
    try:
        data = np.array([[float(r[0]), float(r[1])] for r in rows])
    except (ValueError, IndexError):
        raise InputError(f"{path}: every row needs two numbers, position and intensity") \
            from None
    if not np.all(np.isfinite(data)):
        raise InputError(f"{path}: the profile holds non-finite values")
    order = np.argsort(data[:, 0], kind="stable")
    data = data[order]
    if np.any(np.diff(data[:, 0]) <= 0):
        raise InputError(f"{path}: positions repeat")
    return data[:, 0], data[:, 1]


@dataclass
class ProfileDetection:
    """Disks and fringes found in a profile (positions in the profile's unit)."""

    position: np.ndarray
    intensity: np.ndarray
    disk_edges: np.ndarray          # (2, 2): [direct, diffracted] x [low, high]
    disk_centres: np.ndarray        # (2,)
    disk_centre_sigma: np.ndarray   # (2,)
    bragg_position: float
    minima: np.ndarray              # positions of the dark fringes used (both sides)
    minima_sigma: np.ndarray
    fringes: np.ndarray             # distances from the Bragg position, increasing
    fringes_sigma: np.ndarray
    separation: float
    separation_sigma: float
    warnings: list = field(default_factory=list)


def _segments(mask):
    padded = np.concatenate([[False], mask, [False]])
    change = np.flatnonzero(np.diff(padded.astype(int)))
    return list(zip(change[::2], change[1::2] - 1))


def _edge(position, smooth, start, stop, level):
    """First crossing below ``level`` walking from index ``start`` toward ``stop``."""
    step = 1 if stop > start else -1
    for k in range(start, stop, step):
        a, b = smooth[k], smooth[k + step]
        if a >= level > b:
            f = (a - level) / (a - b)
            return position[k] + f * (position[k + step] - position[k])
    return position[stop]


def detect_profile(position, intensity):
    """Find the two disks and the dark fringes of the diffracted disk.

    The profile runs along +g: the direct disk comes first, the diffracted
    disk second.  Disks are the two widest regions above a threshold between
    the background and the bright level, after bridging dark fringes by a
    closing that grows until exactly two similar disks remain.  Fringes are
    the prominent minima of the smoothed profile inside the diffracted disk,
    each located by a parabola through the raw samples around it; the Bragg
    position is the centre of symmetry of the fringes on both sides (or the
    disk centre when only one side shows fringes).
    """
    from scipy.ndimage import binary_closing, uniform_filter1d
    from scipy.signal import find_peaks

    x = np.asarray(position, dtype=float)
    y = np.asarray(intensity, dtype=float)
    n = len(x)
    step = float(np.median(np.diff(x)))
    smooth = uniform_filter1d(y, size=max(3, n // 400 * 2 + 1))
    light = uniform_filter1d(y, size=3)
    low, high = np.percentile(smooth, [5, 99])
    if high <= low:
        raise InputError("the profile is flat: no disks found")
    mask = smooth > low + 0.25 * (high - low)
    disks = None
    for size in np.unique(np.geomspace(1, max(2, n // 8), 40).astype(int)):
        closed = binary_closing(mask, structure=np.ones(size)) if size > 1 else mask
        segs = [sg for sg in _segments(closed) if sg[1] - sg[0] + 1 >= max(5, n // 50)]
        if len(segs) == 2:
            w = [sg[1] - sg[0] + 1 for sg in segs]
            if min(w) >= 0.7 * max(w):
                disks = segs
                break
    if disks is None:
        raise InputError("the profile does not show two disks of similar width (direct and "
                         "diffracted): check the profile runs through both")
    warnings = []
    edges = np.empty((2, 2))
    edge_sigma = np.empty((2, 2))
    noise = float(np.std(y - smooth)) if n > 10 else 0.0
    for k, (i0, i1) in enumerate(disks):
        # the disk's floor (inelastic background between fringes) sits above the
        # outside level; the edge is where the lightly smoothed profile crosses
        # half-way between the two
        floor = np.percentile(smooth[i0:i1 + 1], 10)
        top = floor if floor - low > 0.1 * (high - low) else np.percentile(smooth[i0:i1 + 1], 75)
        level = low + 0.5 * (top - low)
        reach = max(5, (i1 - i0) // 5)
        for side, (start, inward, stop) in enumerate([(i0, 1, max(i0 - reach, 0)),
                                                      (i1, -1, min(i1 + reach, n - 1))]):
            while light[start] < level and abs(start - (i0, i1)[side]) < reach:
                start += inward
            edges[k, side] = _edge(x, light, start, stop, level)
        for side, e in enumerate(edges[k]):
            j = int(np.clip(np.searchsorted(x, e), 3, n - 4))
            slope = np.max(np.abs(np.gradient(light[j - 3:j + 4], x[j - 3:j + 4])))
            edge_sigma[k, side] = max(noise / slope if slope > 0 else step, step / math.sqrt(12))
    centres = edges.mean(axis=1)
    centre_sigma = np.sqrt(np.sum(edge_sigma ** 2, axis=1)) / 2
    if np.mean(y[disks[1][0]:disks[1][1] + 1]) > 1.2 * np.mean(y[disks[0][0]:disks[0][1] + 1]):
        warnings.append("the second disk is brighter than the first: is the profile taken "
                        "along +g (direct disk first)?")
    i0, i1 = disks[1]
    margin = max(2, n // 400 * 2 + 3)  # the smoothing window, where edges blur in
    lo, hi = i0 + margin, i1 - margin
    inner = smooth[lo:hi + 1]
    prominence = 0.08 * (inner.max() - inner.min())
    peaks, _ = find_peaks(-inner, prominence=prominence)
    peaks = peaks + lo
    minima, minima_sigma = [], []
    for p in peaks:
        neighbours = sorted(peaks, key=lambda q: abs(q - p))
        spacing = abs(neighbours[1] - p) if len(neighbours) > 1 else (hi - lo) // 4
        # a short window: the fringe is parabolic near its zero, but the
        # envelope and the chirp of the fringe series bias wider windows
        half = int(max(2, min(spacing // 8, (hi - lo) // 20)))
        sl = slice(max(p - half, 0), min(p + half + 1, n))
        xs, ys = x[sl] - x[p], y[sl]
        coef, cov = np.polyfit(xs, ys, 2, cov=True) if len(xs) > 3 else (None, None)
        if coef is None or coef[0] <= 0:
            minima.append(x[p])
            minima_sigma.append(step)
            continue
        vertex = -coef[1] / (2 * coef[0])
        if abs(vertex) > half * step:
            vertex = 0.0
        dv = np.array([coef[1] / (2 * coef[0] ** 2), -1 / (2 * coef[0]), 0.0])
        minima.append(x[p] + vertex)
        minima_sigma.append(max(math.sqrt(max(dv @ cov @ dv, 0.0)), step / 20))
    minima, minima_sigma = np.array(minima), np.array(minima_sigma)
    centre = centres[1]
    # a minimum at the Bragg position itself (t/xi just above a half-integer)
    # is not a dark fringe of the series: the first fringes sit symmetrically
    # at +-s_1, half their spacing from the centre
    if len(minima) > 1:
        gaps = np.abs(minima[:, None] - minima[None, :])
        gaps[np.diag_indices(len(minima))] = np.inf
        central = np.abs(minima - centre) < 0.25 * gaps.min(axis=1)
        minima, minima_sigma = minima[~central], minima_sigma[~central]
    left = minima[minima < centre][::-1]
    right = minima[minima > centre]
    ls = minima_sigma[minima < centre][::-1]
    rs = minima_sigma[minima > centre]
    if len(left) and len(right):
        m = min(len(left), len(right))
        bragg = float(np.mean((left[:m] + right[:m]) / 2))
        spread = np.std((left[:m] + right[:m]) / 2) if m > 1 else 0.0
        if abs(bragg - centre) > 3 * max(centre_sigma[1], spread, step):
            warnings.append(f"the fringes are centred {bragg - centre:+.3g} from the disk "
                            "centre: the two-beam condition was not exact; distances are "
                            "measured from the fringes' centre of symmetry")
        dist_l = bragg - left
        dist_r = right - bragg
        fr = 0.5 * (dist_l[:m] + dist_r[:m])
        fs = 0.5 * np.sqrt(ls[:m] ** 2 + rs[:m] ** 2)
        disagreement = 0.5 * np.abs(dist_l[:m] - dist_r[:m])
        fs = np.sqrt(fs ** 2 + disagreement ** 2 / 2)
        extra = dist_r[m:] if len(dist_r) > m else dist_l[m:]
        extra_s = rs[m:] if len(dist_r) > m else ls[m:]
        fr = np.concatenate([fr, extra])
        fs = np.concatenate([fs, extra_s])
    else:
        bragg = float(centre)
        side = right if len(right) else left
        sig = rs if len(right) else ls
        fr = np.abs(side - bragg)
        fs = np.sqrt(sig ** 2 + centre_sigma[1] ** 2)
        warnings.append("fringes found on one side of the diffracted disk only: the Bragg "
                        "position is taken as the disk centre")
    order = np.argsort(fr)
    fr, fs = fr[order], fs[order]
    keep = fr > 0
    return ProfileDetection(
        position=x, intensity=y, disk_edges=edges, disk_centres=centres,
        disk_centre_sigma=centre_sigma, bragg_position=bragg, minima=minima,
        minima_sigma=minima_sigma, fringes=fr[keep], fringes_sigma=fs[keep],
        separation=float(centres[1] - centres[0]),
        separation_sigma=float(math.hypot(*centre_sigma)), warnings=warnings)
