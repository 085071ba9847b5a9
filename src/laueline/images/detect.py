"""Finding the central disk and its HOLZ deficit lines to sub-pixel precision.

Steps:

1. The disk: the largest bright region (Otsu threshold of the smoothed
   image), then sub-pixel edge points on rays from its provisional centre,
   then a RANSAC circle fit (:class:`skimage.measure.CircleModel`).  Edge
   points at the image border or on saturated pixels are left out, so a
   disk partly outside the frame is still found.
2. The background: a grey closing removes the thin dark lines, a Gaussian
   smooths what remains; the disk is divided by it (flat = image/background
   - 1), which also removes gradients across the disk.
3. Candidates: a straight-line Hough transform
   (:func:`skimage.transform.hough_line`) of the pixels darker than three
   noise sigmas, normalised by the expected count of noise pixels along
   each chord so that short chords near the rim compete fairly.
4. Refinement: each candidate is fitted by least squares to the flattened
   intensities of a band of pixels around it, along its whole length, with
   the model b - D exp(-d^2 / 2 w^2) and d the distance to a gently curved
   line, d = n.(p - c) - rho - kappa s^2 (s along the line from the foot of
   the normal from the disk centre c).  Pixels near other lines are left
   out.  The fit's covariance gives the position uncertainty.
5. Checks: duplicates are merged, lines that continue outside the disk
   (deficit lines cannot) or whose width is far from the others' are
   flagged and left out of crossings and fits, with a warning.

Pixel coordinates are (x, y) = (column, row), y down (:mod:`laueline.images`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError

__all__ = ["Disk", "DetectedLine", "Detection", "find_disk", "detect_lines",
           "DETECTION_SCHEMA"]

DETECTION_SCHEMA = "laueline.detection/1"
_FWHM = 2 * math.sqrt(2 * math.log(2))


@dataclass
class Disk:
    center_px: tuple
    radius_px: float
    rms_px: float = 0.0
    n_edge_points: int = 0
    given: bool = False


@dataclass
class DetectedLine:
    """A deficit line found in the image.

    The line is d(p) = 0 with d = n.(p - c) - offset - curvature s^2,
    n = (cos a, sin a) for the normal angle a, s = m.(p - c) with
    m = (-sin a, cos a), and c the disk centre.
    """

    normal_angle_deg: float
    offset_px: float
    curvature_per_px: float
    depth: float
    width_px: float
    covariance: np.ndarray        # (offset px, angle rad, curvature 1/px)
    snr: float
    points_px: np.ndarray         # polyline along the line inside the disk
    n_pixels: int
    flag: str = ""

    @property
    def offset_sigma_px(self):
        return float(math.sqrt(max(self.covariance[0, 0], 0.0)))

    @property
    def angle_sigma_deg(self):
        return float(math.degrees(math.sqrt(max(self.covariance[1, 1], 0.0))))


@dataclass
class Detection:
    """Everything :func:`detect_lines` found."""

    shape: tuple
    disk: Disk
    lines: list
    crossing_lines: np.ndarray      # (p, 2) indices into lines
    crossing_px: np.ndarray         # (p, 2)
    crossing_sigma_px: np.ndarray   # (p, 2)
    crossing_angle_deg: np.ndarray  # (p,)
    noise: float
    saturated_px: int
    warnings: list = field(default_factory=list)
    source: str = ""

    @property
    def good_lines(self):
        return [i for i, ln in enumerate(self.lines) if not ln.flag]


# ---------------------------------------------------------------------------
# the disk
# ---------------------------------------------------------------------------

def find_disk(image, valid=None):
    """Centre and radius (px) of the central disk.

    Parameters
    ----------
    image : ndarray (rows, cols)
    valid : ndarray of bool, optional
        Pixels that may be used (False for saturated ones).
    """
    from scipy import ndimage
    from skimage.filters import threshold_otsu
    from skimage.measure import CircleModel, ransac

    rows, cols = image.shape
    smooth = ndimage.gaussian_filter(image, 2.0)
    try:
        level = threshold_otsu(smooth)
    except ValueError:
        raise InputError("the image is uniform: no disk found") from None
    mask = smooth > level
    labels, count = ndimage.label(mask)
    if count == 0:
        raise InputError("no bright disk found in the image")
    sizes = ndimage.sum(mask, labels, index=np.arange(1, count + 1))
    region = ndimage.binary_fill_holes(labels == (1 + int(np.argmax(sizes))))
    if region.sum() < 300:
        raise InputError("no disk found: the brightest region is only "
                         f"{int(region.sum())} pixels")
    yy, xx = np.nonzero(region)
    centre = np.array([xx.mean(), yy.mean()])
    radius = math.sqrt(region.sum() / math.pi)
    inside_level = np.median(smooth[region])
    outside_level = np.median(smooth[~region]) if np.any(~region) else 0.0
    half = 0.5 * (inside_level + outside_level)
    angles = np.linspace(0, 2 * np.pi, 720, endpoint=False)
    for attempt in range(2):  # the first circle fit moves the centre; cast the rays again
        if attempt == 0:
            radii = np.linspace(0.6 * radius, 1.4 * radius, int(1.6 * radius))
        else:  # close to the edge now: a narrow, finely sampled window
            radii = np.linspace(radius - 10.0, radius + 10.0, 41)
        px = centre[0] + np.outer(np.cos(angles), radii)
        py = centre[1] + np.outer(np.sin(angles), radii)
        inside_frame = (px >= 1) & (px <= cols - 2) & (py >= 1) & (py <= rows - 2)
        values = ndimage.map_coordinates(smooth, [py, px], order=1, mode="nearest")
        ok_valid = np.ones_like(values, dtype=bool) if valid is None else \
            ndimage.map_coordinates(valid.astype(float), [py, px], order=0) > 0.5
        # the outermost downward crossing of the half level on each ray
        down = (values[:, :-1] >= half) & (values[:, 1:] < half)
        last = down.shape[1] - 1 - np.argmax(down[:, ::-1], axis=1)
        k = np.arange(len(angles))
        usable = (down.any(axis=1) & inside_frame[k, last] & inside_frame[k, last + 1]
                  & ok_valid[k, last] & ok_valid[k, last + 1])
        k, j = k[usable], last[usable]
        if len(k) < 20:
            raise InputError("no disk found: too little of a disk edge is visible")
        f = (values[k, j] - half) / (values[k, j] - values[k, j + 1])
        rr = radii[j] + f * (radii[j + 1] - radii[j])
        edges = centre + rr[:, None] * np.stack([np.cos(angles[k]), np.sin(angles[k])], 1)
        model, inliers = ransac(edges, CircleModel, min_samples=3, residual_threshold=1.5,
                                max_trials=200, rng=0)
        if model is None or inliers is None or inliers.sum() < 10:
            raise InputError("no disk found: the bright region is not circular")
        xc, yc, radius = _circle(model)
        centre = np.array([xc, yc])
    final = _circle_fit(edges[inliers])
    xc, yc, radius = _circle(final)
    res = final.residuals(edges[inliers])
    if radius < 10:
        raise InputError(f"no usable disk found (radius {radius:.1f} px)")
    return Disk((float(xc), float(yc)), float(radius), float(np.sqrt(np.mean(res ** 2))),
                int(inliers.sum()))


def _circle_fit(points):
    """Least-squares circle through edge points (scikit-image's CircleModel)."""
    from skimage.measure import CircleModel

    if hasattr(CircleModel, "from_estimate"):
        return CircleModel.from_estimate(points)
    model = CircleModel()
    model.estimate(points)
    return model


def _circle(model):
    if hasattr(model, "center") and hasattr(model, "radius"):
        return float(model.center[0]), float(model.center[1]), float(model.radius)
    xc, yc, r = model.params
    return float(xc), float(yc), float(r)


# ---------------------------------------------------------------------------
# lines
# ---------------------------------------------------------------------------

def _line_model(params, px, py, cx, cy):
    rho, ang, kappa, depth, sigma, base = params
    ca, sa = math.cos(ang), math.sin(ang)
    u, v = px - cx, py - cy
    s = -sa * u + ca * v
    along_n = ca * u + sa * v
    d = along_n - rho - kappa * s * s
    g = np.exp(-0.5 * (d / sigma) ** 2)
    model = base - depth * g
    # derivatives of the model
    dd_drho = -1.0
    dd_dang = s - kappa * 2 * s * (-along_n)  # d(along_n)/da = s; ds/da = -along_n
    dd_dkappa = -s * s
    dm_dd = depth * g * d / sigma ** 2
    jac = np.empty((len(g), 6))
    jac[:, 0] = dm_dd * dd_drho
    jac[:, 1] = dm_dd * dd_dang
    jac[:, 2] = dm_dd * dd_dkappa
    jac[:, 3] = -g
    jac[:, 4] = -dm_dd * d / sigma
    jac[:, 5] = 1.0
    return model, jac, d


def _distance(rho, ang, kappa, px, py, cx, cy):
    """Signed distance of pixels from the curved line(s); broadcasts over arrays."""
    ca, sa = np.cos(ang), np.sin(ang)
    u, v = px - cx, py - cy
    s = -sa * u + ca * v
    return ca * u + sa * v - rho - kappa * s * s


def _fit_line(flat, valid, start, others, disk, noise):
    """Least-squares profile fit of one line in a band of pixels; None if it fails."""
    from scipy.optimize import least_squares

    rho, ang, kappa, sigma = start
    cx, cy = disk.center_px
    half_band = max(4.0 * sigma, 3.0)
    band = _band_pixels(valid, disk, rho, ang, half_band)
    if band is None:
        return None
    ix, iy = band
    fx, fy = ix.astype(float), iy.astype(float)
    span = math.sqrt(max(disk.radius_px ** 2 - rho ** 2, 0.0))
    d0 = _distance(rho, ang, kappa, fx, fy, cx, cy)
    near = np.abs(d0) <= half_band
    fx, fy, ix, iy = fx[near], fy[near], ix[near], iy[near]
    if len(others):
        o = np.asarray(others, dtype=float)                  # (k, 4): rho, angle, kappa, sigma
        d_o = _distance(o[:, 0], o[:, 1], o[:, 2], fx[:, None], fy[:, None], cx, cy)
        clear = np.all(np.abs(d_o) > 2.5 * o[:, 3] + 1.0, axis=1)
        fx, fy, ix, iy = fx[clear], fy[clear], ix[clear], iy[clear]
    if len(fx) < 40:
        return None
    data = flat[iy, ix]
    depth0 = max(-np.min(data), noise)
    x0 = np.array([rho, ang, kappa, depth0, sigma, 0.0])

    # the exact locus bends by well under a pixel across a disk: a Gaussian
    # prior holds the curvature to a sagitta of about 0.1 px over the half
    # chord unless the data insist
    kappa_prior = 0.1 / span ** 2
    prior_weight = noise / kappa_prior

    def fun(p):
        return np.append(_line_model(p, fx, fy, cx, cy)[0] - data, prior_weight * p[2])

    def jac(p):
        j = _line_model(p, fx, fy, cx, cy)[1]
        row = np.zeros((1, 6))
        row[0, 2] = prior_weight
        return np.vstack([j, row])

    try:
        res = least_squares(fun, x0, jac=jac, method="lm",
                            x_scale=[1.0, 0.01, 1e-4, 0.05, 1.0, 0.01], max_nfev=60)
    except (ValueError, np.linalg.LinAlgError):
        return None
    p = res.x
    if not np.all(np.isfinite(p)) or p[3] <= 0 or not 0.3 < abs(p[4]) < 10:
        return None
    p[4] = abs(p[4])
    dof = max(len(data) - 6, 1)
    s2 = float(np.sum(res.fun ** 2) / dof)
    try:
        cov = np.linalg.inv(res.jac.T @ res.jac) * s2
    except np.linalg.LinAlgError:
        return None
    return p, cov, len(data)


def _band_pixels(valid, disk, rho, ang, half_band):
    """Usable pixels (ix, iy) within ``half_band`` of a straight chord, or None."""
    rows, cols = valid.shape
    cx, cy = disk.center_px
    ca, sa = math.cos(ang), math.sin(ang)
    span = math.sqrt(max(disk.radius_px ** 2 - rho ** 2, 0.0))
    if span < 10:
        return None
    s = np.arange(-span, span + 1.0)
    w = np.arange(-math.ceil(half_band), math.ceil(half_band) + 1.0)
    px = cx + rho * ca + s[:, None] * (-sa) + w[None, :] * ca
    py = cy + rho * sa + s[:, None] * ca + w[None, :] * sa
    ix, iy = np.round(px).astype(int).ravel(), np.round(py).astype(int).ravel()
    ok = (ix >= 0) & (ix < cols) & (iy >= 0) & (iy < rows)
    key = np.sort(iy[ok] * cols + ix[ok])
    key = key[np.concatenate([[True], key[1:] != key[:-1]])]  # each pixel once
    iy, ix = key // cols, key % cols
    keep = valid[iy, ix]
    return ix[keep], iy[keep]


def _quick_fit(flat, valid, start, disk, noise):
    """Fast first look at a candidate: line through the dip centroids along it.

    Returns (rho, angle, significance) or None; significance is the mean
    depth at the line over its standard error.
    """
    rho, ang = start[0], start[1]
    cx, cy = disk.center_px
    band = _band_pixels(valid, disk, rho, ang, 5.0)
    if band is None:
        return None
    ix, iy = band
    fx, fy = ix - cx, iy - cy
    ca, sa = math.cos(ang), math.sin(ang)
    d = ca * fx + sa * fy - rho
    s = -sa * fx + ca * fy
    dip = np.maximum(-flat[iy, ix], 0.0)
    bins = np.floor((s - s.min()) / 12.0).astype(int)
    weight = np.bincount(bins, dip)
    has = weight > 0
    if has.sum() < 3:
        return None
    centroid = np.bincount(bins, dip * d)[has] / weight[has]
    s_mid = np.bincount(bins, s)[has] / np.bincount(bins)[has]
    design = np.stack([np.ones_like(s_mid), s_mid], axis=1) * np.sqrt(weight[has])[:, None]
    coef = np.linalg.lstsq(design, centroid * np.sqrt(weight[has]), rcond=None)[0]
    rho_new, ang_new = rho + coef[0], ang - math.atan(coef[1])
    d_new = math.cos(ang_new) * fx + math.sin(ang_new) * fy - rho_new
    core, flank = np.abs(d_new) < 1.0, (np.abs(d_new) > 3.5) & (np.abs(d_new) < 5.0)
    if core.sum() < 10 or flank.sum() < 10:
        return None
    depth = np.mean(flat[iy[flank], ix[flank]]) - np.mean(flat[iy[core], ix[core]])
    error = noise * math.sqrt(1.0 / core.sum() + 1.0 / flank.sum())
    return rho_new, ang_new, depth / error


def _hough_candidates(ridge, interior, disk, max_lines):
    from skimage.feature import peak_local_max
    from skimage.transform import hough_line

    theta = np.linspace(-np.pi / 2, np.pi / 2, 720, endpoint=False)  # 0.25 deg bins
    acc, angles, dists = hough_line(ridge, theta=theta)
    p = ridge.sum() / max(interior.sum(), 1)
    cx, cy = disk.center_px
    # distance of each (d, theta) line from the disk centre -> chord length
    rho_c = dists[:, None] - (cx * np.cos(angles) + cy * np.sin(angles))[None, :]
    chord = 2 * np.sqrt(np.clip(disk.radius_px ** 2 - rho_c ** 2, 0, None))
    expected = p * chord
    z = (acc - expected) / np.sqrt(expected + 1.0)
    z[chord < 20] = 0
    peaks = peak_local_max(z, min_distance=4, threshold_abs=6.0, num_peaks=max_lines,
                           exclude_border=False)
    out = []
    for i, j in peaks:
        out.append((float(rho_c[i, j]), float(angles[j]), float(z[i, j])))
    return out


def detect_lines(image, *, disk=None, saturation=None, min_angle_deg=5.0, max_lines=150,
                 source=""):
    """Detect the central disk, its deficit lines and their crossings.

    Parameters
    ----------
    image : ndarray (rows, cols)
    disk : (x, y, radius) in px, optional
        Skip the disk search.
    saturation : float, optional
        Pixel value at which the detector saturates (the integer maximum of
        the file type); pixels at that value are left out.
    min_angle_deg : float
        Crossings of lines meeting at a smaller angle are not reported.
    max_lines : int
        Most candidates considered.

    Returns
    -------
    Detection
    """
    from scipy import ndimage

    image = np.asarray(image, dtype=float)
    rows, cols = image.shape
    warnings = []
    top = image.max()
    at_top = image >= top
    saturated = np.zeros_like(at_top)
    if (saturation is not None and top >= saturation) or at_top.sum() > max(20, 1e-4 * image.size):
        saturated = ndimage.binary_dilation(at_top, iterations=1)
        warnings.append(f"{int(at_top.sum())} saturated pixels (value {top:g}) left out")
    valid = ~saturated
    if disk is None:
        disk = find_disk(image, valid)
    else:
        x, y, r = (float(v) for v in disk)
        if not r > 0:
            raise InputError("the disk radius must be positive")
        disk = Disk((x, y), r, given=True)
    cx, cy = disk.center_px
    yy, xx = np.mgrid[0:rows, 0:cols]
    r = np.hypot(xx - cx, yy - cy)
    if not np.any(r < disk.radius_px - 5):
        raise InputError("the disk lies outside the image")
    frac_in_frame = _fraction_in_frame(disk, rows, cols)
    if frac_in_frame < 0.98:
        warnings.append(f"the disk is partly outside the frame ({100 * (1 - frac_in_frame):.0f} "
                        "% of its area): lines are fitted where visible")

    # background and flattening
    closing_px = int(max(7, round(disk.radius_px / 20)) | 1)
    margin = 6.0  # px inside the fitted rim, clear of the blurred disk edge
    interior = (r < disk.radius_px - margin) & valid
    # outside the disk (and on saturated pixels) continue the disk's own level
    # from the nearest inside pixel, so that the background is unbiased up to the rim
    source = interior | ((r < disk.radius_px - 2) & valid)
    if not np.any(source):
        raise InputError("no usable pixels inside the disk")
    _, (iy, ix) = ndimage.distance_transform_edt(~source, return_indices=True)
    filled = image[iy, ix]
    # smoothing first keeps the closing from riding on the noise maxima
    closed = ndimage.grey_closing(ndimage.gaussian_filter(filled, 1.0),
                                  size=(closing_px, closing_px))
    background = ndimage.gaussian_filter(closed, closing_px / 2.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(interior, image / background, 1.0)
    ratio /= np.median(ratio[interior])  # lines cover little of the disk
    flat = np.where(interior, ratio - 1.0, 0.0)
    # pixel noise from differences of pixels two columns apart (beyond the
    # reach of a detector blur; lines are rare): MAD / 0.6745, over sqrt(2)
    both = interior[:, 2:] & interior[:, :-2]
    diff = (flat[:, 2:] - flat[:, :-2])[both]
    noise = float(1.4826 * np.median(np.abs(diff - np.median(diff))) / math.sqrt(2))
    noise = max(noise, 1e-3)  # noiseless (rendered) images: 0.1 % keeps thresholds sane

    # candidates
    smooth = ndimage.gaussian_filter(flat, 1.0)
    noise_smooth = noise / (2 * math.sqrt(math.pi) * 1.0)  # white noise under a sigma-1 Gaussian
    ridge = (-smooth > 3.0 * noise_smooth) & interior
    candidates = _hough_candidates(ridge, interior, disk, max_lines)
    starts = [(rho, ang, 0.0, 1.0) for rho, ang, _ in candidates]

    # first every candidate alone (neighbouring Hough peaks of one line would
    # otherwise mask each other), then, once duplicates are merged, each line
    # again with the pixels near all other lines left out
    quick = []
    for st in starts:
        q = _quick_fit(flat, interior, st, disk, noise)
        if q is not None and q[2] > 10.0:
            quick.append((np.array([q[0], q[1], 0.0, q[2], 1.0, 0.0]), np.eye(6), 0))
    quick = _merge_duplicates(quick, disk, key=lambda f: -f[0][3])
    fitted = _fit_all(flat, interior, [(p[0], p[1], 0.0, 1.0) for p, _, _ in quick], True,
                      disk, noise)
    lines = [_make_line(p, cov, npx, disk) for p, cov, npx in fitted]
    _flag_lines(lines, image, valid, disk, warnings)
    lines.sort(key=lambda ln: -ln.snr)

    pairs, xy, sig, ang = _crossings(lines, disk, min_angle_deg)
    if len([ln for ln in lines if not ln.flag]) < 2:
        warnings.append("fewer than two lines found in the disk")
    return Detection(shape=(rows, cols), disk=disk, lines=lines, crossing_lines=pairs,
                     crossing_px=xy, crossing_sigma_px=sig, crossing_angle_deg=ang,
                     noise=noise, saturated_px=int(at_top.sum()) if saturated.any() else 0,
                     warnings=warnings, source=str(source))


def _fit_all(flat, valid, starts, exclude_others, disk, noise):
    fits = []
    gap = _gap_matrix([st[:3] for st in starts], disk) if starts else None
    for k, st in enumerate(starts):
        others = [o for j, o in enumerate(starts)
                  if j != k and gap[j, k] > 4.0] if exclude_others else []
        res = _fit_line(flat, valid, st, others, disk, noise)
        if res is None:
            continue
        p, cov, npx = res
        if p[3] < 8 * math.sqrt(max(cov[3, 3], 0)) or cov[0, 0] > 0.25:
            continue  # not significant, or not located to half a pixel
        if _gap_matrix([p[:3], st[:3]], disk)[0, 1] > 4.0:
            continue  # wandered off to another feature
        fits.append((p, cov, npx))
    return _merge_duplicates(fits, disk)


def _fraction_in_frame(disk, rows, cols):
    cx, cy = disk.center_px
    a = np.linspace(0, 2 * np.pi, 72, endpoint=False)
    rr = np.sqrt(np.linspace(0.0, 1.0, 12))[1:] * disk.radius_px
    px = cx + np.outer(rr, np.cos(a))
    py = cy + np.outer(rr, np.sin(a))
    return float(np.mean((px >= 0) & (px <= cols - 1) & (py >= 0) & (py <= rows - 1)))


def _gap_matrix(params, disk, samples=9):
    """gap[i, j]: largest distance (px) from line j of points along line i's chord."""
    params = np.asarray(params, dtype=float).reshape(-1, 3)
    cx, cy = disk.center_px
    rho, ang, kappa = params[:, 0], params[:, 1], params[:, 2]
    span = np.sqrt(np.maximum(disk.radius_px ** 2 - rho ** 2, 0.0))
    sv = np.linspace(-1, 1, samples)[None, :] * span[:, None]
    ca, sa = np.cos(ang)[:, None], np.sin(ang)[:, None]
    off = rho[:, None] + kappa[:, None] * sv * sv
    u, v = off * ca - sv * sa, off * sa + sv * ca              # (n, k) relative to c
    d = _distance(rho[None, :, None], ang[None, :, None], kappa[None, :, None],
                  u[:, None, :], v[:, None, :], 0.0, 0.0)
    return np.max(np.abs(d), axis=2)


def _merge_duplicates(fits, disk, key=None):
    """Keep the most significant of fits that trace the same line (within 2 px)."""
    key = key or (lambda f: -f[0][3] / math.sqrt(max(f[1][3, 3], 1e-30)))
    fits = sorted(fits, key=key)
    if not fits:
        return fits
    gap = _gap_matrix([f[0][:3] for f in fits], disk)
    kept = []
    for i in range(len(fits)):
        if not any(gap[i, j] < 2.0 for j in kept):
            kept.append(i)
    return [fits[i] for i in kept]


def _make_line(p, cov, npx, disk):
    rho, ang, kappa, depth, sigma, base = p
    c3 = cov[:3, :3]
    # keep the angle in (-pi, pi] with a non-negative offset for a unique description
    if rho < 0:
        rho, ang, kappa = -rho, ang + np.pi, -kappa
        flip = np.diag([-1.0, 1.0, -1.0])
        c3 = flip @ c3 @ flip
    ang = (ang + np.pi) % (2 * np.pi) - np.pi
    cx, cy = disk.center_px
    span = math.sqrt(max(disk.radius_px ** 2 - rho ** 2, 0.0))
    s = np.linspace(-span, span, 64)
    ca, sa = math.cos(ang), math.sin(ang)
    offset = rho + kappa * s * s
    pts = np.stack([cx + offset * ca - s * sa, cy + offset * sa + s * ca], axis=1)
    inside = np.hypot(pts[:, 0] - cx, pts[:, 1] - cy) <= disk.radius_px + 1e-9
    snr = float(depth / math.sqrt(max(cov[3, 3], 1e-30)))
    return DetectedLine(float(math.degrees(ang)), float(rho), float(kappa),
                        float(depth / (1 + base)) if base > -1 else float(depth),
                        float(sigma * _FWHM), c3, snr, pts[inside], int(npx))


def _flag_lines(lines, image, valid, disk, warnings):
    """Flag lines that continue outside the disk or have an unusual width.

    Beyond both ends of each chord (6 to 40 px outside the rim) the image
    along the line is compared with its two flanks; a deficit line ends at
    the rim, an artefact (scratch, seam, straight streak) does not.
    """
    if not lines:
        return
    from scipy import ndimage

    cx, cy = disk.center_px
    rows, cols = image.shape
    median_width = float(np.median([ln.width_px for ln in lines]))
    steps = np.arange(6.0, 40.0)
    coords, owner = [], []
    for k, ln in enumerate(lines):
        ang = math.radians(ln.normal_angle_deg)
        ca, sa = math.cos(ang), math.sin(ang)
        span = math.sqrt(max(disk.radius_px ** 2 - ln.offset_px ** 2, 0.0))
        shift = 3 * ln.width_px
        for sign in (-1, 1):
            sv = sign * (span + steps)
            fx = cx + ln.offset_px * ca - sv * sa
            fy = cy + ln.offset_px * sa + sv * ca
            ok = (fx >= 2) & (fx <= cols - 3) & (fy >= 2) & (fy <= rows - 3)
            # line and both flanks must lie outside the disk (a line near the rim
            # has one flank inside it)
            for side in (-1, 1):
                ok &= np.hypot(fx + side * shift * ca - cx, fy + side * shift * sa - cy) > \
                    disk.radius_px + 3
            if ok.sum() < 10:
                continue
            for dx, dy in ((0, 0), (shift * ca, shift * sa), (-shift * ca, -shift * sa)):
                coords.append(np.stack([fy[ok] + dy, fx[ok] + dx]))
            owner.append((k, int(ok.sum())))
    contrast = {}
    if coords:
        values = ndimage.map_coordinates(image, np.concatenate(coords, axis=1), order=1)
        pos = 0
        for k, n in owner:
            on, plus, minus = values[pos:pos + n], values[pos + n:pos + 2 * n], \
                values[pos + 2 * n:pos + 3 * n]
            pos += 3 * n
            diff = 0.5 * (plus + minus) - on
            z = np.mean(diff) / (np.std(diff) / math.sqrt(n) + 1e-12)
            contrast[k] = max(contrast.get(k, -np.inf), z)
    for k, ln in enumerate(lines):
        if contrast.get(k, 0.0) > 6.0:
            ln.flag = "continues outside the disk: an artefact, not a deficit line"
        elif ln.width_px > 2.5 * median_width or ln.width_px < 0.4 * median_width:
            ln.flag = (f"width {ln.width_px:.1f} px is far from the median "
                       f"{median_width:.1f} px")
    for ln in lines:
        if ln.flag:
            warnings.append(f"line at angle {ln.normal_angle_deg:.1f} deg, offset "
                            f"{ln.offset_px:.1f} px left out: {ln.flag}")


def _crossings(lines, disk, min_angle_deg):
    """Crossings of all pairs of good lines, with covariances, vectorised over pairs."""
    good = np.array([i for i, ln in enumerate(lines) if not ln.flag], dtype=int)
    empty = (np.zeros((0, 2), int), np.zeros((0, 2)), np.zeros((0, 2)), np.zeros(0))
    if len(good) < 2:
        return empty
    cx, cy = disk.center_px
    par = np.array([[lines[i].offset_px, math.radians(lines[i].normal_angle_deg),
                     lines[i].curvature_per_px] for i in good])
    cov = np.array([lines[i].covariance for i in good])
    ia, ib = np.triu_indices(len(good), 1)
    sin_angle = np.abs(np.sin(par[ia, 1] - par[ib, 1]))
    wide = sin_angle >= math.sin(math.radians(min_angle_deg))
    ia, ib, sin_angle = ia[wide], ib[wide], sin_angle[wide]
    if not len(ia):
        return empty
    pa, pb = par[ia], par[ib]
    na = np.stack([np.cos(pa[:, 1]), np.sin(pa[:, 1])], 1)
    nb = np.stack([np.cos(pb[:, 1]), np.sin(pb[:, 1])], 1)
    ma, mb = np.stack([-na[:, 1], na[:, 0]], 1), np.stack([-nb[:, 1], nb[:, 0]], 1)
    det = na[:, 0] * nb[:, 1] - na[:, 1] * nb[:, 0]
    u = np.stack([(pa[:, 0] * nb[:, 1] - pb[:, 0] * na[:, 1]) / det,
                  (na[:, 0] * pb[:, 0] - nb[:, 0] * pa[:, 0]) / det], 1)  # relative to c

    def parts(q, p, n, m):
        s = np.sum(q * m, axis=1)
        along = np.sum(q * n, axis=1)
        d = along - p[:, 0] - p[:, 2] * s * s
        grad = n - 2 * p[:, 2, None] * s[:, None] * m
        dparams = np.stack([-np.ones_like(s), s + 2 * p[:, 2] * s * along, -s * s], 1)
        return d, grad, dparams

    for _ in range(4):  # Newton on the two curves; the curvature term is tiny
        da, ga, _ = parts(u, pa, na, ma)
        db, gb, _ = parts(u, pb, nb, mb)
        jd = ga[:, 0] * gb[:, 1] - ga[:, 1] * gb[:, 0]
        u = u - np.stack([(da * gb[:, 1] - db * ga[:, 1]) / jd,
                          (ga[:, 0] * db - gb[:, 0] * da) / jd], 1)
    _, ga, dpa = parts(u, pa, na, ma)
    _, gb, dpb = parts(u, pb, nb, mb)
    jp = np.stack([ga, gb], axis=1)                 # (k, 2, 2): rows grad d_a, grad d_b
    jinv = np.linalg.inv(jp)
    # implicit function theorem: dp = -Jp^-1 [dd_a; dd_b]
    jac_a = -jinv[:, :, 0:1] * dpa[:, None, :]      # (k, 2, 3)
    jac_b = -jinv[:, :, 1:2] * dpb[:, None, :]
    cov_p = (jac_a @ cov[ia] @ np.swapaxes(jac_a, 1, 2) +
             jac_b @ cov[ib] @ np.swapaxes(jac_b, 1, 2))
    inside = np.hypot(u[:, 0], u[:, 1]) <= disk.radius_px - 1
    xy = u + np.array([cx, cy])
    pairs = np.stack([good[ia], good[ib]], 1)
    sig = np.sqrt(np.maximum(np.stack([cov_p[:, 0, 0], cov_p[:, 1, 1]], 1), 0))
    angles = np.degrees(np.arcsin(np.minimum(sin_angle, 1.0)))
    return pairs[inside], xy[inside], sig[inside], angles[inside]
