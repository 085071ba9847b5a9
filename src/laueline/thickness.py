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
negative slope).  With a structure given, a numbering whose extinction
distance is more than 30 % from the kinematic value gives way to one within
it that fits nearly as well (a many-beam profile bends the line slightly).

The deviation parameter of a fringe at distance x from the Bragg position
in the diffracted disk, with the disk separation L (the 2 theta_B distance),
is s = lambda x / (d^2 L) (small angles; Williams and Carter, *Transmission
Electron Microscopy*, 2009, ch. 20).  Distances x and L may be in any one
unit (pixels, mm on a print).

The construction assumes two beams.  With the systematic row (..., -g, 0,
g, 2g, ...) present the fringes move and it is biased (about +1.4 % for a
180 nm Si foil in the 220 condition at 200 kV); :func:`fit_profile` instead
fits many-beam intensities of the row, from the Bloch-wave engine of
:mod:`laueline.dynamical`, to the whole profile through both disks.  Tilts
along g are the tangential component of the incident wave vector over K in
mrad, from the exact Bragg condition of g, positive toward +g; the foil
normal is normal to g.

Units here: lengths of the foil in nm, s in 1/nm.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError
from .results import ResultMixin
from .limits import check_inputs
from .optics import relativistic_factor, wavelength_A

__all__ = ["ThicknessResult", "thickness_from_fringes", "kinematic_extinction_distance_nm",
           "ProfileDetection", "detect_profile", "read_profile", "two_beam_intensity",
           "step_response", "systematic_row", "row_wavevectors", "row_intensities",
           "ProfileFitResult", "fit_profile"]

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


@dataclass(repr=False)
class ThicknessResult(ResultMixin):
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

    def _summary(self):
        return (f"t = {self.thickness_nm:.1f} +- {self.thickness_sigma_nm:.2g} nm, extinction "
                f"distance {self.extinction_distance_nm:.1f} nm, first fringe index "
                f"{self.first_fringe_index}, {len(self.fringes)} fringes (Kelly-Allen)")

    def _document(self):
        from .report import thickness_document

        return thickness_document(self)

    def _figure(self, **kwargs):
        from .plot import thickness_figure

        return thickness_figure(self, **kwargs)


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
        if kinematic is not None and abs(best.extinction_distance_nm / kinematic - 1) > 0.3:
            # many-beam profiles bend the line a little, so two numberings can
            # fit about equally; the effective extinction distance of a
            # systematic row stays within some 20 % of the kinematic two-beam
            # value (Hirsch et al. 1965, ch. 12), a wrong numbering does not
            near = [c for c in physical if abs(c.extinction_distance_nm / kinematic - 1) <= 0.3
                    and c.residual <= 10 * best.residual + 1e-12]
            if near:
                straightest = best
                best = min(near, key=lambda c: c.residual)
                warnings.append(
                    f"the straightest line (first index {straightest.first_fringe_index}) "
                    f"implies an extinction distance of {straightest.extinction_distance_nm:.1f}"
                    f" nm, far from the kinematic {kinematic:.1f} nm; first index "
                    f"{best.first_fringe_index} fits nearly as well with "
                    f"{best.extinction_distance_nm:.1f} nm and was taken")
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


def _uniform(x, y):
    """The profile on evenly spaced positions (interpolated when the spacing varies)."""
    steps = np.diff(x)
    step = float(np.median(steps))
    if np.ptp(steps) <= 0.01 * step:
        return x, y, step
    grid = np.linspace(x[0], x[-1], int(round((x[-1] - x[0]) / step)) + 1)
    return grid, np.interp(grid, x, y), float(grid[1] - grid[0])


def _jump_weights(window, gap):
    """Weights extrapolating a straight line fitted to ``window`` samples across ``gap``.

    The samples lie at distances gap + 0.5, gap + 1.5, ... from the point of
    extrapolation (in samples); the result applied to them gives the line's
    value there.
    """
    u = gap + 0.5 + np.arange(window)
    du = u - u.mean()
    return 1.0 / window - u.mean() * du / np.sum(du * du)


def step_response(intensity, window=8, gap=2):
    """Signed height of a step between every pair of neighbouring samples.

    Straight lines are fitted to ``window`` samples on each side, leaving
    ``gap`` samples out next to the step (where a blurred edge rises), and
    extrapolated to the mid-point; the response is the right value minus the
    left one.  Smooth curvature (fringes) cancels to first order, while a
    disk edge responds with its full height whatever its blur up to about
    ``gap`` samples.

    Returns
    -------
    jump : ndarray, shape (n - 1,)
        Element k is the step between samples k and k + 1 (zero where the
        windows do not fit in the profile).
    noise_factor : float
        Standard deviation of the response per unit standard deviation of
        independent noise in the samples.
    """
    y = np.asarray(intensity, dtype=float)
    n = len(y)
    c = _jump_weights(window, gap)
    reach = gap + window
    jump = np.zeros(n - 1)
    if n > 2 * reach:
        # right[k] = sum_i c_i y[k + 1 + gap + i]; left[k] = sum_i c_i y[k - gap - i]
        right = np.correlate(y, c, mode="valid")          # right[j] = sum c_i y[j + i]
        left = np.correlate(y, c[::-1], mode="valid")     # left[j] = sum c_i y[j + w - 1 - i]
        k = np.arange(reach - 1, n - 1 - reach + 1)
        jump[k] = right[k + 1 + gap] - left[k - gap - window + 1]
    return jump, float(math.sqrt(2 * np.sum(c * c)))


def _noise_level(y):
    """Robust standard deviation of independent sample noise (second differences)."""
    d2 = y[2:] - 2 * y[1:-1] + y[:-2]
    return float(1.4826 * np.median(np.abs(d2 - np.median(d2))) / math.sqrt(6))


def _strongest_steps(jump, reach):
    """The step response with its side lobes and lesser neighbours zeroed.

    A linear-extrapolation step filter answers a sharp edge with side lobes of
    the opposite sign, up to 0.7 of the main response for windows of 8 samples
    or more, one window away.  A sample is kept when it is the largest of its
    sign within ``reach`` and no response of the other sign nearby is more
    than 1.25 times larger (which a side lobe's parent always is).
    """
    from scipy.ndimage import maximum_filter1d

    size = 2 * reach + 1
    pos = np.clip(jump, 0, None)
    neg = np.clip(-jump, 0, None)
    max_pos, max_neg = maximum_filter1d(pos, size), maximum_filter1d(neg, size)
    keep_pos = (pos > 0) & (pos >= max_pos) & (1.25 * pos >= max_neg)
    keep_neg = (neg > 0) & (neg >= max_neg) & (1.25 * neg >= max_pos)
    return np.where(keep_pos | keep_neg, jump, 0.0)


def _find_disks(y, jump, noise, noise_jump, reach):
    """Sample indices (rise, fall) of the direct disk and the shift to the diffracted one.

    The direct disk is the strongest rise of the step response and the
    strongest fall after it.  The diffracted disk has the same width (both are
    images of the one condenser aperture) and must hold every sample that
    stands clear of the background beyond the direct disk; within the shifts
    that allow this, its edges are placed where rise and fall together step
    most.  Its outer fringes may be as dark as the background, so its own
    edges are not required to show.

    Returns
    -------
    rise, fall : int
        Steps (between sample k and k + 1) of the direct disk.
    shift : int
        Best shift in samples.
    shift_range : (int, int)
        The shifts that keep all of the diffracted signal inside the disk.
    """
    from scipy.ndimage import uniform_filter1d

    n = len(y)
    steps = _strongest_steps(jump, reach)
    min_width = max(5, n // 50)
    rise = int(np.argmax(steps))
    # the direct disk's edges are sharp steps of a tenth of the profile's range
    # or more, far above the noise
    floor = max(5 * noise_jump, 0.1 * float(np.ptp(y)))
    if steps[rise] < floor:
        raise InputError("the profile does not show two disks (direct and diffracted): no "
                         "sharp disk edge found")
    size = 2 * reach + 1
    smooth = uniform_filter1d(y, size)
    outside = y[:max(rise - reach, 0)]
    # the direct disk ends where the profile drops to the background for good
    # (the gap before the diffracted disk): its fall is the strongest step down
    # just before that gap, however strong the falls of fringes inside it
    fall = None
    if len(outside) >= 10:
        level = float(np.median(outside)) + 5 * noise / math.sqrt(size)
        low = smooth[rise + min_width:] <= level
        run = np.convolve(low, np.ones(size, dtype=int), mode="valid") == size
        if np.any(run):
            gap = rise + min_width + int(np.argmax(run))
            lo, hi = max(gap - 2 * size, rise + min_width), min(gap + size, len(steps))
            k = lo + int(np.argmin(steps[lo:hi]))
            if steps[k] < -5 * noise_jump:
                fall = k
    if fall is None:
        after = steps[rise + min_width:]
        if len(after) == 0 or after.min() > -floor:
            raise InputError("the profile does not show two disks (direct and diffracted): "
                             "check the profile runs through both")
        fall = rise + min_width + int(np.argmin(after))
    width = fall - rise
    start = fall + 2 * size              # clear of the direct disk's smoothed edge
    beyond = smooth[start:]
    if len(beyond) < width:
        raise InputError("the profile ends before a second disk as wide as the first: check "
                         "it runs through both disks along +g, direct disk first")
    background = float(np.median(outside)) if len(outside) >= 10 else \
        float(np.percentile(beyond, 5))
    if len(outside) >= 10:
        # the background may slope across the pattern: a straight line through the
        # level before the direct disk and the lowest level just after it (the gap
        # between the disks, or the diffracted disk's dark outer fringes)
        near = smooth[start:start + max(width // 2, 1)]
        k_low = start + int(np.argmin(near))
        x_out = 0.5 * (len(outside) - 1)
        slope = (smooth[k_low] - background) / (k_low - x_out)
        background = background + slope * (np.arange(start, n) - x_out)
    signal = np.flatnonzero(beyond > background + 5 * noise / math.sqrt(size))
    if len(signal) == 0:
        raise InputError("no diffracted disk stands out from the background after the "
                         "direct disk")
    first, last = signal[0] + start, signal[-1] + start
    lo, hi = last - fall, first - rise      # shifts keeping [first, last] inside the box
    if lo > hi:                              # signal wider than the disk: centre it
        lo = hi = int(round((first + last - rise - fall) / 2))
    lo, hi = max(lo - reach, width), min(hi + reach, len(jump) - 1 - fall)
    if lo > hi:
        raise InputError("the profile does not show two separate disks of the same width "
                         "(direct and diffracted)")
    shifts = np.arange(lo, hi + 1)
    score = steps[rise + shifts] - steps[fall + shifts]
    return rise, fall, int(shifts[np.argmax(score)]), (int(lo), int(hi))


def _edge_crossing(x, light, k, window, gap):
    """Sub-sample position of a step found between samples k and k + 1.

    The step's mid-level is half-way between the straight lines extrapolated
    from both sides (as in :func:`step_response`); the edge is where the
    lightly smoothed profile crosses it nearest to the step.  Returns the
    position and the slope there (profile units per position unit).
    """
    n = len(light)
    c = _jump_weights(window, gap)
    left = float(c @ light[np.clip(k - gap - np.arange(window), 0, n - 1)])
    right = float(c @ light[np.clip(k + 1 + gap + np.arange(window), 0, n - 1)])
    level = 0.5 * (left + right)
    j_all = np.arange(max(k - gap - 1, 0), min(k + gap + 2, n - 1))
    a, b = light[j_all], light[j_all + 1]
    crossing = ((a - level) * (b - level) <= 0) & (a != b)
    if not np.any(crossing):
        return x[k] + 0.5 * (x[k + 1] - x[k]), 0.0
    j = j_all[crossing][np.argmin(np.abs(j_all[crossing] - k))]
    f = (level - light[j]) / (light[j + 1] - light[j])
    slope = abs(light[j + 1] - light[j]) / (x[j + 1] - x[j])
    return x[j] + f * (x[j + 1] - x[j]), slope


def _symmetry_centre(minima, centre):
    """Centre of mirror symmetry of fringe minima and the tolerance used, or None.

    Every mid-point of two minima is tried; its score is the number of minima
    whose mirror image falls within a fifth of the typical fringe spacing of
    another minimum.  The best score wins, ties going to the candidate
    nearest ``centre`` (the disk centre).
    """
    if len(minima) < 2:
        return None
    ordered = np.sort(minima)
    tol = 0.2 * float(np.median(np.diff(ordered)))
    i, j = np.triu_indices(len(minima), 1)
    trial = 0.5 * (minima[i] + minima[j])
    mirrored = 2 * trial[:, None] - minima[None, :]                  # (pairs, minima)
    distance = np.abs(mirrored[:, :, None] - minima[None, None, :])
    distance[:, np.arange(len(minima)), np.arange(len(minima))] = np.inf
    score = np.sum(distance.min(axis=2) < tol, axis=1)
    best = np.flatnonzero(score == score.max())
    k = best[np.argmin(np.abs(trial[best] - centre))]
    return float(trial[k]), tol


def detect_profile(position, intensity):
    """Find the two disks and the dark fringes of the diffracted disk.

    The profile runs along +g: the direct disk comes first, the diffracted
    disk second.  The direct disk's edges are the strongest steps of
    :func:`step_response` (its far edge the last one before the gap to the
    second disk), each placed where the profile crosses the step's
    mid-level.  The diffracted disk has the same width; it is placed from
    its own edges where they step clearly, and otherwise where it holds all
    the signal beyond the direct disk, since its outer fringes can be as dark
    as the background.  Fringes are the prominent minima of the smoothed
    profile inside the diffracted disk, each located by a parabola through
    the raw samples around it; the Bragg position is the fringes' centre of
    mirror symmetry (or the disk centre when only one side shows fringes).
    Unevenly spaced samples are interpolated onto an even grid first.
    """
    from scipy.ndimage import uniform_filter1d
    from scipy.signal import find_peaks

    x0 = np.asarray(position, dtype=float)
    y0 = np.asarray(intensity, dtype=float)
    x, y, step = _uniform(x0, y0)
    n = len(x)
    if np.ptp(y) <= 0:
        raise InputError("the profile is flat: no disks found")
    smooth = uniform_filter1d(y, size=max(3, n // 400 * 2 + 1))
    light = uniform_filter1d(y, size=3)
    window, gap = int(np.clip(n // 120, 8, 16)), 2
    jump, factor = step_response(y, window, gap)
    noise = _noise_level(y)
    noise_jump = max(noise * factor, 1e-3 * float(np.ptp(y)))
    r0, f0, shift, shift_range = _find_disks(y, jump, noise, noise_jump, window + gap)
    steps = _strongest_steps(jump, window + gap)
    warnings = []
    edges = np.empty((2, 2))
    edge_sigma = np.empty((2, 2))
    for side, k in enumerate((r0, f0)):
        pos, slope = _edge_crossing(x, light, k, window, gap)
        edges[0, side] = pos
        edge_sigma[0, side] = max(noise / slope if slope > 0 else step, step / math.sqrt(12))
    # the diffracted disk is the direct disk moved by the separation: each of
    # its edges that shows a clear step measures that separation once
    shifts, shift_sigma = [], []
    for side, k in enumerate((r0 + shift, f0 + shift)):
        if abs(steps[k]) < 5 * noise_jump:
            continue
        pos, slope = _edge_crossing(x, light, k, window, gap)
        sigma = max(noise / slope if slope > 0 else step, step / math.sqrt(12))
        shifts.append(pos - edges[0, side])
        shift_sigma.append(math.hypot(sigma, edge_sigma[0, side]))
    if shifts:
        w = 1.0 / np.square(shift_sigma)
        separation = float(np.sum(w * np.array(shifts)) / np.sum(w))
        separation_sigma = float(1.0 / math.sqrt(np.sum(w)))
        if len(shifts) == 2:
            separation_sigma = max(separation_sigma, abs(shifts[0] - shifts[1]) / 2)
    else:
        # no edge of its own: the disk lies somewhere in the range of shifts
        # that keeps all of its signal inside it
        separation = 0.5 * (shift_range[0] + shift_range[1]) * step
        separation_sigma = max((shift_range[1] - shift_range[0]) * step / math.sqrt(12), step)
        warnings.append("neither edge of the diffracted disk stands out from the "
                        "background: its position rests on the direct disk's width and the "
                        "best match of the step pattern")
    if len(shifts) == 1:
        warnings.append("one edge of the diffracted disk is as dark as the background: the "
                        "disk is placed from its other edge and the direct disk's width")
    edges[1] = edges[0] + separation
    edge_sigma[1] = np.hypot(edge_sigma[0], separation_sigma)
    centres = edges.mean(axis=1)
    centre_sigma = np.array([math.hypot(*edge_sigma[0]) / 2,
                             math.hypot(math.hypot(*edge_sigma[0]) / 2, separation_sigma)])
    i0, i1 = np.searchsorted(x, edges[1])
    direct_mean = float(np.mean(y[r0 + 1:f0 + 1]))
    if np.mean(y[i0:i1]) > 1.2 * direct_mean:
        warnings.append("the second disk is brighter than the first: is the profile taken "
                        "along +g (direct disk first)?")
    margin = max(2, n // 400 * 2 + 3, gap + 2)  # where the smoothed edges blur in
    lo, hi = i0 + margin, i1 - 1 - margin
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
    # the Bragg line is the fringes' centre of symmetry: among the mid-points
    # of all pairs of minima, the one that mirrors most minima onto others
    # (ties: nearest the disk centre).  A minimum on that line itself (t/xi
    # just above a half-integer) is not a dark fringe of the series.
    symmetry = _symmetry_centre(minima, centre)
    if symmetry is not None:
        symmetry, tol = symmetry
        central = np.abs(minima - symmetry) < tol
        minima, minima_sigma = minima[~central], minima_sigma[~central]
        centre = symmetry
    left = minima[minima < centre][::-1]
    right = minima[minima > centre]
    ls = minima_sigma[minima < centre][::-1]
    rs = minima_sigma[minima > centre]
    if len(left) and len(right):
        m = min(len(left), len(right))
        bragg = float(np.mean((left[:m] + right[:m]) / 2))
        spread = np.std((left[:m] + right[:m]) / 2) if m > 1 else 0.0
        if abs(bragg - centres[1]) > 3 * max(centre_sigma[1], spread, step):
            warnings.append(f"the fringes are centred {bragg - centres[1]:+.3g} from the disk "
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
        position=x0, intensity=y0, disk_edges=edges, disk_centres=centres,
        disk_centre_sigma=centre_sigma, bragg_position=bragg, minima=minima,
        minima_sigma=minima_sigma, fringes=fr[keep], fringes_sigma=fs[keep],
        separation=separation, separation_sigma=separation_sigma, warnings=warnings)


# ---------------------------------------------------------------------------
# whole-profile fit with systematic-row Bloch waves
# ---------------------------------------------------------------------------

DEFAULT_ROW_BEAMS = 9
#: The profile fit scales the row's potential coefficients within 1 +- this.
_POTENTIAL_RANGE = 0.1
#: Parameters moved while the thickness and absorption are searched: all but the
#: potential scale (every new scale needs new Bloch states), freed at the end.
_SEARCH_FREE = np.arange(4)


def systematic_row(hkl, n_beams=DEFAULT_ROW_BEAMS):
    """The beams n g of a systematic row, direct beam first, then g, -g, 2g, -2g, ...

    Parameters
    ----------
    hkl : sequence of 3 int
        The reflection g excited in the two-beam condition.
    n_beams : int
        Odd number of beams, 2 N + 1 with n = -N..N; at least 3.

    Returns
    -------
    ndarray of int, shape (n_beams, 3)
    """
    n_beams = int(n_beams)
    if n_beams < 3 or n_beams % 2 == 0:
        raise InputError(f"n_beams must be an odd number of at least 3, got {n_beams}")
    half = n_beams // 2
    order = np.array([0] + [v for m in range(1, half + 1) for v in (m, -m)])
    return order[:, None] * np.asarray(hkl, dtype=np.int64).reshape(1, 3)


def _row_geometry(crystal, hkl, kv):
    """Unit vector along g, a foil normal normal to it, |g| (1/A) and the wave number."""
    from .optics import wave_number

    g_vec = crystal.g_vectors(np.asarray(hkl, dtype=float).reshape(1, 3))[0]
    g = float(np.linalg.norm(g_vec))
    along = g_vec / g
    helper = np.eye(3)[int(np.argmin(np.abs(along)))]
    normal = np.cross(along, helper)
    normal /= np.linalg.norm(normal)
    return along, normal, g, wave_number(kv)


def row_wavevectors(crystal, hkl, tilt_mrad, kv):
    """Incident wave vectors for tilts along g (Cartesian, 1/angstrom).

    ``tilt_mrad`` is the tangential component of the incident wave vector
    along g over K, in mrad, measured from the exact Bragg condition of g
    (where it is -500 lambda |g|); positive tilts move toward +g, which is
    the direction along which a profile runs.  The outward foil normal is
    normal to g, and the incident wave vector is
    K (u g_hat - sqrt(1 - u^2) n) with u the tangential component.
    """
    along, normal, g, k = _row_geometry(crystal, hkl, kv)
    u = np.asarray(tilt_mrad, dtype=float) * 1e-3 - 0.5 * g / k
    return k * (u[:, None] * along - np.sqrt(1.0 - u * u)[:, None] * normal), normal


def row_intensities(crystal, hkl, tilt_mrad, thickness_nm, *, kv,
                    n_beams=DEFAULT_ROW_BEAMS, absorption_ratio=0.1):
    """Direct and diffracted intensities of a systematic row against tilt.

    Many-beam Bloch-wave intensities (:mod:`laueline.dynamical`) of the beams
    n g, n = -N..N, for incident directions tilted along g.

    Parameters
    ----------
    crystal : Crystal
    hkl : sequence of 3 int
    tilt_mrad : array_like, shape (m,)
        Tilt from the exact Bragg condition of g (see :func:`row_wavevectors`).
    thickness_nm : float
    kv : float
    n_beams : int
        2 N + 1 beams of the row.
    absorption_ratio : float
        a in U'_g = a U_g.

    Returns
    -------
    ndarray, shape (m, 2)
        I_0 and I_g for unit incident intensity.
    """
    from .dynamical import bloch_intensities

    k, normal = row_wavevectors(crystal, hkl, tilt_mrad, kv)
    return bloch_intensities(crystal, systematic_row(hkl, n_beams), k, thickness_nm, kv=kv,
                             absorption_ratio=absorption_ratio, foil_normal=normal,
                             beams_out=[0, 1])


class _RowStates:
    """Bloch states of a systematic row on a tilt grid, for any thickness.

    The eigen-decomposition does not depend on the thickness, so a fit that
    tries many thicknesses solves it once.  The matrix is the one of
    :mod:`laueline.dynamical` (its coupling and excitation terms); only the
    propagation through the thickness is repeated here.
    """

    def __init__(self, crystal, hkl, tilt_mrad, kv, n_beams, absorption_ratio,
                 potential_scale=1.0):
        from .dynamical import coupling_matrix, excitation_matrices

        beams = systematic_row(hkl, n_beams)
        k, normal = row_wavevectors(crystal, hkl, tilt_mrad, kv)
        coupling = potential_scale * coupling_matrix(crystal, beams, kv, absorption_ratio)
        diagonal = excitation_matrices(crystal.g_vectors(beams), k)
        mats = np.broadcast_to(coupling, (len(k),) + coupling.shape).copy()
        idx = np.arange(len(beams))
        mats[:, idx, idx] += diagonal
        lam, vec = np.linalg.eig(mats)
        e0 = np.zeros((len(k), len(beams), 1), dtype=complex)
        e0[:, 0, 0] = 1.0
        alpha = np.linalg.solve(vec, e0)[..., 0]
        self.weights = vec[:, :2, :] * alpha[:, None, :]         # (m, 2, n)
        self.rate = 2j * math.pi * lam / (2.0 * (-k @ normal))[:, None]   # per angstrom

    def intensities(self, thickness_nm):
        amp = np.einsum("mbj,mj->mb", self.weights, np.exp(self.rate * (thickness_nm * 10.0)))
        return amp.real ** 2 + amp.imag ** 2


@dataclass(repr=False)
class ProfileFitResult(ResultMixin):
    """Thickness from a fit of systematic-row Bloch-wave intensities to a profile.

    Positions and lengths are in the profile's unit ("px" below).  The
    modelled profile is

        b + blur * [c (D0 + D1) + A (D0 I_0(u0) + D1 I_g(u1))],

    with D0, D1 the direct and diffracted disks (the direct disk's measured
    edges, and the same moved by ``scale`` times 2 theta_B), u0 and u1 the
    tilts from the Bragg condition seen at each position, ``blur`` a Gaussian
    of standard deviation ``blur_px``, b the background, c a diffuse level
    inside the disks and A the incident intensity.

    ``thickness_sigma_nm`` is the total 1-sigma: the statistical part (from
    the fit's covariance, scaled by its reduced chi-square) and the model
    part (the largest change of the thickness when the absorption ratio is
    halved or doubled, added in quadrature to the change when the row is
    cut by two beams) added in quadrature.  ``reduced_chi2`` compares the
    residual variance with the sample noise estimated from second
    differences alone (about 1 when the model holds).
    """

    thickness_nm: float
    thickness_sigma_nm: float
    thickness_statistical_sigma_nm: float
    thickness_model_sigma_nm: float
    model_variants: list
    scale_px_per_mrad: float
    scale_sigma_px_per_mrad: float
    bragg_position: float
    bragg_position_sigma: float
    blur_px: float
    background: float
    diffuse: float
    amplitude: float
    reduced_chi2: float
    n_samples: int
    n_beams: int
    absorption_ratio: float
    absorption_fitted: bool
    hkl: tuple
    kv: float
    separation: float
    position: np.ndarray
    intensity: np.ndarray
    fitted: np.ndarray
    kelly_allen: ThicknessResult | None = None
    detection: ProfileDetection | None = None
    warnings: list = field(default_factory=list)
    success: bool = True
    failure: str | None = None
    potential_scale: float = 1.0
    potential_scale_sigma: float = 0.0

    def _summary(self):
        return (f"t = {self.thickness_nm:.1f} +- {self.thickness_sigma_nm:.2g} nm (many-beam fit"
                f" of {self.n_beams} beams, {self.kv:g} kV)"
                + ("" if self.success else f"; failed: {self.failure}"))

    def _document(self):
        from .report import thickness_fit_document

        return thickness_fit_document(self)

    def _figure(self, **kwargs):
        from .plot import thickness_fit_figure

        return thickness_fit_figure(self, **kwargs)


def _coverage(position, step, lo, hi):
    """Fraction of each sample's cell [p - step/2, p + step/2] inside [lo, hi]."""
    a = np.maximum(position - 0.5 * step, lo)
    b = np.minimum(position + 0.5 * step, hi)
    return np.clip(b - a, 0.0, step) / step


class _ProfileModel:
    """Model of a two-disk profile for given thickness, scale, Bragg position and blur."""

    def __init__(self, make_states, grid_mrad, x, y, step, edges, two_theta_mrad):
        self.make_states, self.grid = make_states, grid_mrad
        self._states = {}
        self.x, self.y, self.step = x, y, step
        self.edges, self.two_theta = edges, two_theta_mrad
        self.weights = np.ones_like(y)
        self._cache = (None, None)
        # background: a constant and a linear trend across the profile (the
        # diffuse and inelastic background of a pattern is rarely flat)
        middle, half = 0.5 * (x[0] + x[-1]), 0.5 * (x[-1] - x[0])
        self.background = np.stack([np.ones_like(x), (x - middle) / half], axis=1)

    def _rows(self, thickness, potential_scale):
        key = (thickness, potential_scale)
        if self._cache[0] != key:
            states = self._states.get(potential_scale)
            if states is None:
                if len(self._states) > 16:
                    self._states.clear()
                states = self._states[potential_scale] = self.make_states(potential_scale)
            self._cache = (key, states.intensities(thickness))
        return self._cache[1]

    def basis(self, params):
        from scipy.ndimage import gaussian_filter1d

        thickness, scale, bragg, blur, potential_scale = params
        rows = self._rows(thickness, potential_scale)
        u0 = (self.x - bragg) / scale
        u1 = u0 - self.two_theta
        d0 = _coverage(self.x, self.step, *self.edges)
        d1 = _coverage(self.x, self.step, *(self.edges + scale * self.two_theta))
        i0 = np.interp(u0, self.grid, rows[:, 0])
        ig = np.interp(u1, self.grid, rows[:, 1])
        blurred = gaussian_filter1d(np.stack([d0 + d1, d0 * i0 + d1 * ig], axis=1),
                                    blur / self.step, axis=0, mode="nearest")
        return np.concatenate([self.background, blurred], axis=1)

    def solve(self, params):
        cols = self.basis(params)
        w = self.weights[:, None]
        coef = np.linalg.lstsq(cols * w, self.y * w[:, 0], rcond=None)[0]
        return cols @ coef, coef

    def residuals(self, params):
        model, _ = self.solve(params)
        return (self.y - model) * self.weights


def _noise_gain(y, expected):
    """Variance per unit intensity of the sample noise, from second differences.

    For independent noise of variance gain * I the second difference
    y[i-1] - 2 y[i] + y[i+1] has variance close to 6 gain I[i]; the median of
    its square over 6 I, divided by 0.4549 (the median of chi-square with one
    degree of freedom), estimates the gain without any model of the profile,
    so the fit's residuals can be compared with it.
    """
    d2 = y[2:] - 2 * y[1:-1] + y[:-2]
    return float(np.median(d2 * d2 / (6.0 * expected[1:-1])) / 0.4549)


def _local_fit(model, start, lower, upper, x_scale, free=None):
    """Least squares from ``start``; only the parameters ``free`` (indices) move.

    The result's ``x`` holds every parameter (the others at their start values).
    """
    from scipy.optimize import least_squares

    start = np.clip(np.asarray(start, dtype=float), lower, upper)
    if free is None:
        free = np.arange(len(start))
    free = np.asarray(free)

    def residuals(sub):
        full = start.copy()
        full[free] = sub
        return model.residuals(full)

    res = least_squares(residuals, start[free], bounds=(lower[free], upper[free]),
                        x_scale=x_scale[free], method="trf", xtol=1e-9, ftol=1e-10,
                        gtol=1e-10, diff_step=1e-6, max_nfev=400)
    full = start.copy()
    full[free] = res.x
    res.x = full
    return res


def fit_profile(position, intensity, crystal, hkl, *, kv=200.0, n_beams=DEFAULT_ROW_BEAMS,
                absorption_ratio=0.1, fit_absorption=True, thickness_range_nm=(20.0, 1000.0)):
    """Foil thickness from a two-beam profile by fitting many-beam intensities.

    The profile runs along +g through the direct and the diffracted disk.
    The direct disk's edges and the diffracted disk's position come from
    :func:`detect_profile`; the Kelly-Allen construction on the same profile
    (:func:`thickness_from_fringes`) is reported beside the fit and used to
    start it.  The fit matches the systematic-row Bloch-wave intensities
    (beams n g, n = -N..N, :mod:`laueline.dynamical`) to the measured
    profile through both disks: thickness, scale (profile units per mrad),
    position of the Bragg condition and Gaussian blur by least squares, with
    the background, a diffuse level in the disks and the incident intensity
    solved linearly at every step.  Samples are weighted as Poisson counts of
    unknown gain (variance proportional to the modelled intensity).  The
    thickness is first scanned (steps of 3 %) over the range given and
    the best few minima refined, so the fit does not hang on one fringe
    numbering.  The model's uncertainty is the change of the thickness when
    the absorption ratio is halved and doubled and when the row loses two
    beams.

    Parameters
    ----------
    position, intensity : array_like
        The profile (any position unit, increasing).
    crystal : Crystal
    hkl : sequence of 3 int
        The reflection in two-beam condition (the profile runs along +g).
    kv : float
        Accelerating voltage.
    n_beams : int
        Beams of the systematic row, odd, 3 or more (9 by default).
    absorption_ratio : float
        a in U'_g = a U_g, [0, 1); 0.1 by default (common practice).  With
        ``fit_absorption`` the centre of the search for it.
    fit_absorption : bool
        Choose the absorption ratio that matches the profile best, among
        the given value times 2^(k/2), k = -4..4 (0.005 to 0.6), refined
        by a parabola in log(a) through the best and its neighbours; the
        profile's fringe contrast and the direct disk's asymmetry fix it
        well, and a wrong fixed value can bias the thickness by a fringe.
        False holds ``absorption_ratio``.
    thickness_range_nm : (float, float)
        Range of thickness searched, nm.

    Returns
    -------
    ProfileFitResult
    """
    from .dynamical import check_absorption_ratio

    a = check_absorption_ratio(absorption_ratio)
    hkl = tuple(int(v) for v in np.asarray(hkl, dtype=int).ravel())
    if len(hkl) != 3 or not any(hkl):
        raise InputError("hkl must be three integers, not all zero")
    if crystal.is_absent(np.array([hkl]))[0]:
        raise InputError(f"({' '.join(map(str, hkl))}) is systematically absent: no two-beam "
                         "condition")
    systematic_row(hkl, n_beams)
    lo_t, hi_t = (float(v) for v in thickness_range_nm)
    if not (0 < lo_t < hi_t <= 2000.0):
        raise InputError("thickness_range_nm must satisfy 0 < low < high <= 2000 nm")
    x0 = np.asarray(position, dtype=float)
    y0 = np.asarray(intensity, dtype=float)
    det = detect_profile(x0, y0)
    warnings = list(det.warnings)
    kelly_allen = None
    try:
        kelly_allen = thickness_from_fringes(
            det.fringes, det.separation, kv=kv, crystal=crystal, hkl=hkl,
            fringes_sigma=det.fringes_sigma, separation_sigma=det.separation_sigma)
        kelly_allen.profile = det
        warnings.extend(f"Kelly-Allen: {w}" for w in kelly_allen.warnings)
    except InputError as exc:
        warnings.append(f"no Kelly-Allen construction: {exc}")
    x, y, step = _uniform(x0, y0)
    _, _, g, k = _row_geometry(crystal, hkl, kv)
    two_theta = 1e3 * g / k                          # disk separation, mrad
    scale0 = det.separation / two_theta
    bragg0 = det.bragg_position - det.separation
    edges = det.disk_edges[0]
    # tilts reached by either disk for scales within 15 % of the start
    half_width = 0.5 * (edges[1] - edges[0]) / scale0
    offset = abs(0.5 * (edges[0] + edges[1]) - bragg0) / scale0
    reach = 1.15 * (half_width + offset) + 0.5
    grid_step = min(0.025, 0.25 * step / scale0)
    grid = np.arange(-reach, reach + grid_step, grid_step)

    def build(n, ratio):
        return _ProfileModel(lambda p: _RowStates(crystal, hkl, grid, kv, n, ratio, p), grid,
                             x, y, step, edges, two_theta)

    blur0 = 1.0 * step
    # the last parameter scales every potential coefficient of the row: scattering
    # factors and Debye-Waller factors from other sources differ by a few per cent,
    # and an extinction distance held wrong by 3 % moves the thickness by 1.5 %; the
    # fringes fix both (as the Kelly-Allen line fixes t and xi_g)
    lower = np.array([1.0, 0.85 * scale0, bragg0 - 0.1 * det.separation, 0.05 * step,
                      1.0 - _POTENTIAL_RANGE])
    upper = np.array([2000.0, 1.15 * scale0, bragg0 + 0.1 * det.separation, 20.0 * step,
                      1.0 + _POTENTIAL_RANGE])
    x_scale = np.array([1.0, 0.001 * scale0, step, step, 0.001])
    trial = np.geomspace(lo_t, hi_t, int(math.log(hi_t / lo_t) / 0.03) + 2)
    from scipy.signal import argrelmin

    def search(model, near=None):
        """Scan the thickness with the geometry held, refine the best minima (unweighted).

        ``near`` (a previous solution) narrows the scan to 15 % around it.
        """
        geometry = (scale0, bragg0, blur0, 1.0) if near is None else tuple(near[1:])
        ts = trial if near is None else near[0] * np.linspace(0.85, 1.15, 31)
        cost = np.array([np.sum(model.residuals((t, *geometry)) ** 2) for t in ts])
        minima = argrelmin(np.concatenate([[np.inf], cost, [np.inf]]))[0] - 1
        starts = list(ts[minima[np.argsort(cost[minima])][:2 if near is None else 1]])
        if near is None and kelly_allen is not None and lo_t < kelly_allen.thickness_nm < hi_t:
            starts.append(kelly_allen.thickness_nm)
        found = None
        for t in starts:
            res = _local_fit(model, np.array([t, *geometry]), lower, upper, x_scale,
                             free=_SEARCH_FREE)
            if found is None or res.cost < found.cost:
                found = res
        return found

    if fit_absorption:
        # the absorption ratio shapes the fringe contrast and the asymmetry of
        # the direct disk strongly; a wrong fixed value pulls the thickness to
        # another fringe count, so the profile chooses it: factors of 2 around
        # the given value, then of sqrt(2) around the best
        tried = {}

        def attempt(ratio, near=None):
            ratio = float(np.clip(ratio, 0.005, 0.6))
            if ratio not in tried:
                m = build(n_beams, ratio)
                tried[ratio] = (search(m, near), m)
            return tried[ratio]

        for f in (0.25, 0.5, 1.0, 2.0, 4.0):
            attempt(a * f)
        a = min(tried, key=lambda r: tried[r][0].cost)
        for f in (2 ** -0.5, 2 ** 0.5):
            attempt(a * f)
        a = min(tried, key=lambda r: tried[r][0].cost)
        # a parabola in log(a) through the best and its neighbours places it
        ratios = sorted(tried)
        i = ratios.index(a)
        if 0 < i < len(ratios) - 1:
            la = np.log(ratios[i - 1:i + 2])
            c = np.polyfit(la, [tried[r][0].cost for r in ratios[i - 1:i + 2]], 2)
            if c[0] > 0:
                refined = float(np.exp(np.clip(-c[1] / (2 * c[0]), la[0], la[2])))
                m = build(n_beams, refined)
                res = _local_fit(m, tried[a][0].x, lower, upper, x_scale,
                                 free=_SEARCH_FREE)
                if res.cost < tried[a][0].cost:
                    tried[refined] = (res, m)
                    a = refined
        best, model = tried[a]
    else:
        model = build(n_beams, a)
        best = search(model)
    # Poisson weights of unknown gain from the unweighted solution, then refit
    fitted, _ = model.solve(best.x)
    floor = 0.02 * float(np.max(fitted))
    model.weights = 1.0 / np.sqrt(np.maximum(fitted, floor))
    best = _local_fit(model, best.x, lower, upper, x_scale)
    fitted, coef = model.solve(best.x)
    resid = model.residuals(best.x)
    dof = max(len(y) - len(best.x) - 4, 1)
    gain = float(np.sum(resid ** 2) / dof)         # variance per unit intensity, fitted
    noise_gain = _noise_gain(y, np.maximum(fitted, floor))
    red_chi2 = gain / noise_gain
    jac = best.jac
    try:
        cov = np.linalg.inv(jac.T @ jac) * gain
        sig = np.sqrt(np.clip(np.diag(cov), 0, None))
    except np.linalg.LinAlgError:
        sig = np.full(5, np.nan)
        warnings.append("the fit's covariance is singular: no statistical uncertainty")
    variants = []
    for label, n, ratio in [("absorption ratio halved", n_beams, 0.5 * a),
                            ("absorption ratio doubled", n_beams, min(2 * a, 0.95)),
                            ("two beams fewer", max(n_beams - 2, 3), a)]:
        if (n, ratio) == (n_beams, a):
            continue
        alt = build(n, ratio)
        alt.weights = model.weights
        # the same solution under the other model: the nearest minimum, within
        # 15 % of the thickness (a wider search could pick another fringe count)
        near = best.x[0] * np.linspace(0.85, 1.15, 31)
        cost = [np.sum(alt.residuals((t, *best.x[1:])) ** 2) for t in near]
        lo_v, hi_v = lower.copy(), upper.copy()
        lo_v[0], hi_v[0] = near[0], near[-1]
        start = np.array([near[int(np.argmin(cost))], *best.x[1:]])
        r = _local_fit(alt, start, lo_v, hi_v, x_scale, free=_SEARCH_FREE)
        variants.append({"variant": label, "n_beams": n, "absorption_ratio": ratio,
                         "thickness_nm": float(r.x[0]),
                         "reduced_chi2": float(np.sum(r.fun ** 2) / dof) / noise_gain})
    t_fit = float(best.x[0])
    shifts = {v["variant"]: v["thickness_nm"] - t_fit for v in variants}
    absorption = max([abs(v) for kk, v in shifts.items() if "absorption" in kk], default=0.0)
    beams = abs(shifts.get("two beams fewer", 0.0))
    model_sigma = math.hypot(absorption, beams)
    total = math.hypot(float(sig[0]), model_sigma)
    failure = None
    if not best.success:
        failure = f"the profile fit did not converge ({best.message})"
    elif red_chi2 > 4:
        # common practice: residuals twice the noise mean the model is wrong
        failure = (f"the model matches the profile poorly (reduced chi-square "
                   f"{red_chi2:.1f}): check the reflection, the voltage and that the profile "
                   "runs along +g through both disks")
    for i, name in enumerate(["thickness", "scale", "Bragg position", "blur",
                              "potential scale"]):
        if np.isclose(best.x[i], lower[i]) or np.isclose(best.x[i], upper[i]):
            if i < 3 and failure is None:
                failure = f"the fitted {name} sits at the bound of its search range"
            else:
                warnings.append(f"the fitted {name} sits at the bound of its search range")
    if failure is not None:
        warnings.append(failure)
    if kelly_allen is not None and kelly_allen.first_fringe_index is not None:
        ka = kelly_allen.thickness_nm
        if abs(ka - t_fit) > 3 * math.hypot(kelly_allen.thickness_sigma_nm, total):
            warnings.append(f"the Kelly-Allen construction gives {ka:.1f} nm, "
                            f"{100 * (ka / t_fit - 1):+.1f} % from the many-beam fit: its "
                            "two-beam assumption does not hold for this row and thickness")
    return ProfileFitResult(
        thickness_nm=t_fit, thickness_sigma_nm=total,
        thickness_statistical_sigma_nm=float(sig[0]), thickness_model_sigma_nm=model_sigma,
        model_variants=variants, scale_px_per_mrad=float(best.x[1]),
        scale_sigma_px_per_mrad=float(sig[1]), bragg_position=float(best.x[2]),
        bragg_position_sigma=float(sig[2]), blur_px=float(best.x[3]),
        background=float(coef[0]), diffuse=float(coef[2]), amplitude=float(coef[3]),
        reduced_chi2=red_chi2, n_samples=len(y), n_beams=int(n_beams), absorption_ratio=a,
        absorption_fitted=bool(fit_absorption),
        hkl=hkl, kv=float(kv), separation=float(best.x[1] * two_theta), position=x,
        intensity=y, fitted=fitted, kelly_allen=kelly_allen, detection=det,
        warnings=warnings, success=failure is None, failure=failure,
        potential_scale=float(best.x[4]), potential_scale_sigma=float(sig[4]))
