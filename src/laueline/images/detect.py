"""Finding the central disk and its HOLZ deficit lines to sub-pixel precision.

Steps:

1. The disk: the largest bright region (Otsu threshold of a smoothed,
   block-averaged copy of about 256 px) and a first RANSAC circle
   (:class:`skimage.measure.CircleModel`) through edge points on rays from
   its centroid; then sub-pixel edge points at full resolution on rays
   smoothed in their polar frame, outliers gated by that circle, and a
   linear least-squares ellipse (radius with cos 2phi and sin 2phi terms)
   that measures the projector's elliptical distortion with its
   uncertainty.  Edge points at the image border or on saturated pixels are
   left out, so a disk partly outside the frame is still found.
2. The background: a grey closing wide enough to span the widest line with
   its fringes removes the lines, a Gaussian smooths what remains (both on
   a block-averaged copy when the window is large); the disk is divided by
   it (flat = image/background - 1): smooth disk intensity and broad bands
   go, lines stay where they are.
3. Candidates (blind search): a straight-line Hough transform
   (:func:`skimage.transform.hough_line`) of the pixels darker than three
   noise sigmas, at block averages 1, 2, 4 (8) so that lines from under 2
   to 15 px wide are seen at some scale, normalised by the count expected
   from noise along each chord; every maximum above six sigmas is kept.
   On a large disk this search, and the screening of its candidates, run
   on a copy block-averaged to a disk of 128 to 256 px radius (finer when
   the lines are narrow for its blocks); the lines are then measured at
   full resolution in bands around them.  With a prediction (:func:`detect_seeded`) the candidates are the exact
   predicted loci mapped by a :class:`~laueline.detector.Detector`,
   elliptical distortion included.
4. Measurement: on short segments along each line the pixels are binned by
   their distance across it (:mod:`laueline.images.lineprofile`); a
   Gaussian dip fitted to every profile at once gives a first position,
   and the line's own template (its profiles aligned and averaged) gives
   the offset from that centre to the deficit minimum, so asymmetric and
   fringed profiles are located at their minimum (with a prediction, these
   offsets are pooled over the lines, each along its g direction, so that
   weak lines lean on strong ones; in the final pass of a seeded search a
   line measured well enough takes instead the minima of the Gauss-Hermite
   series fitted to each of its profiles, as dynamical lines do not share
   one profile shape).  A gently curved line
   d = n.(p - c) - rho - kappa s^2 (s along the line from the foot of the
   normal from the disk centre c) is fitted through the segment minima,
   first with no segment weighing more than a typical one, then with
   outlying segments dropped; pixels near other lines are left out of each
   profile.
5. Checks: candidates seen on too few of their segments or too weak are
   dropped, duplicates merged, lines that continue outside the disk
   (deficit lines cannot) or whose width is far from the others' flagged
   and left out of crossings and fits, with a warning.

Pixel coordinates are (x, y) = (column, row), y down (:mod:`laueline.images`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError

__all__ = ["Disk", "DetectedLine", "Detection", "find_disk", "detect_lines", "detect_seeded",
           "DETECTION_SCHEMA"]

DETECTION_SCHEMA = "laueline.detection/1"
_FWHM = 2 * math.sqrt(2 * math.log(2))


@dataclass
class Disk:
    """The central disk: centre and mean radius (px), and its elliptical distortion.

    ``distortion`` (e1, e2) is that of :class:`laueline.detector.Detector`:
    the edge lies at r(phi) = R (1 + e1 cos 2 phi + e2 sin 2 phi) to first
    order, with ``distortion_sigma`` its 1-sigma; ``distortion_significant``
    is True when the pair differs from zero beyond the 99 % point of
    chi-square with two degrees of freedom (its covariance taken into account).
    """

    center_px: tuple
    radius_px: float
    rms_px: float = 0.0
    n_edge_points: int = 0
    given: bool = False
    distortion: tuple = (0.0, 0.0)
    distortion_sigma: tuple = (0.0, 0.0)
    distortion_significant: bool = False

    @property
    def detector_distortion(self):
        """(e1, e2) for a Detector: the measured pair when significant, else zeros."""
        return tuple(self.distortion) if self.distortion_significant else (0.0, 0.0)


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
    hkl: tuple | None = None      # the predicted line it was sought for (seeded detection)
    minima_px: np.ndarray | None = None        # (k, 2) measured minimum on each segment
    minima_sigma_px: np.ndarray | None = None  # (k,) their 1-sigma along the line normal
    minima_normal: np.ndarray | None = None    # (k, 2) unit normals of those measurements

    @property
    def minima_covariance_px(self):
        """(k, 2, 2) covariances of the segment minima: sigma^2 n n^T (none along the line)."""
        n = self.minima_normal
        return (self.minima_sigma_px ** 2)[:, None, None] * n[:, :, None] * n[:, None, :]

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
    missing: list = field(default_factory=list)   # seeded: predicted lines not found (hkl)

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

    Notes
    -----
    The bright region and a first circle come from a block-averaged copy
    (about 256 px across), so that the cost does not grow with the square
    of the image size; the edge itself is then located at full resolution
    on rays cast from that centre, the image sampled along each ray and
    smoothed by a Gaussian of 2 px in the polar frame of the rays.
    """
    from scipy import ndimage
    from skimage.filters import threshold_otsu

    image = np.asarray(image, dtype=float)
    rows, cols = image.shape
    factor = max(1, min(rows, cols) // 256)
    small = _block_mean(image, factor)
    smooth = ndimage.gaussian_filter(small, max(2.0 / factor, 1.0))
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
    area = float(region.sum()) * factor ** 2
    if area < 300:
        raise InputError(f"no disk found: the brightest region is only {int(area)} pixels")
    yy, xx = np.nonzero(region)
    centre = (np.array([xx.mean(), yy.mean()]) + 0.5) * factor - 0.5
    radius = math.sqrt(area / math.pi)
    inside_level = np.median(smooth[region])
    outside_level = np.median(smooth[~region]) if np.any(~region) else 0.0
    half = 0.5 * (inside_level + outside_level)
    all_valid = valid is None or bool(np.all(valid))
    small_valid = None if all_valid else _block_mean(valid.astype(float), factor) > 0.999
    # first circle: on the block-averaged copy, rays from the region's centroid
    angles = np.linspace(0, 2 * np.pi, 360, endpoint=False)
    radii = np.linspace(0.6 * radius, 1.4 * radius, int(1.6 * radius / factor) + 2)
    px = centre[0] + np.outer(np.cos(angles), radii)
    py = centre[1] + np.outer(np.sin(angles), radii)
    values = ndimage.map_coordinates(smooth, _to_block(py, px, factor), order=1, mode="nearest")
    edges = _ray_edges(values, centre, angles, radii, half, (rows, cols), small_valid, factor)
    centre, radius, _ = _robust_circle(edges, radius)
    # the edge at full resolution: rays close to it, Gaussian-smoothed in the polar frame
    reach = max(10.0, 0.012 * radius)
    sigma, step = 2.0, 0.5
    pad = 3 * sigma
    radii = np.arange(radius - reach - pad, radius + reach + pad + step / 2, step)
    n_fine = 720 * max(1, int(math.ceil(2 * np.pi * radius / sigma / 720)))  # rays <= 2 px apart
    fine = np.linspace(0, 2 * np.pi, n_fine, endpoint=False)
    px = centre[0] + np.outer(np.cos(fine), radii)
    py = centre[1] + np.outer(np.sin(fine), radii)
    values = ndimage.map_coordinates(image, [py, px], order=1, mode="nearest")
    values = ndimage.gaussian_filter1d(values, sigma / step, axis=1, mode="nearest")
    values = ndimage.gaussian_filter1d(values, sigma * n_fine / (2 * np.pi * radius), axis=0,
                                       mode="wrap")
    keep = slice(None, None, n_fine // 720)
    inner = np.abs(radii - radius) <= reach + 1e-9
    edges = _ray_edges(values[keep][:, inner], centre, fine[keep], radii[inner], half,
                       (rows, cols), None if all_valid else valid)
    # the centre is good to a pixel now: gross outliers (lines crossing the rim,
    # dust) are far from the median radius; the ellipse fit clips the rest
    r = np.hypot(*(edges - centre).T)
    inliers = np.abs(r - np.median(r)) < max(2.0, 0.008 * radius)
    if inliers.sum() < 10:
        raise InputError("no disk found: the bright region is not circular")
    radius = float(np.median(r[inliers]))
    if radius < 10:
        raise InputError(f"no usable disk found (radius {radius:.1f} px)")
    return _ellipse_disk(edges[inliers], centre)


def _block_mean(a, factor):
    """Means of factor x factor blocks (trailing rows and columns that fill no block dropped)."""
    if factor == 1:
        return a
    r, c = a.shape[0] // factor * factor, a.shape[1] // factor * factor
    if factor <= 4:  # a few strided sums beat a reduction over a reshaped array
        total = np.zeros((r // factor, c // factor))
        for i in range(factor):
            for j in range(factor):
                total += a[i:r:factor, j:c:factor]
        return total / factor ** 2
    return a[:r, :c].reshape(r // factor, factor, c // factor, factor).mean(axis=(1, 3))


def _ray_edges(values, centre, angles, radii, half, shape, valid=None, factor=1):
    """Outermost downward crossing of the level ``half`` on rays from ``centre``.

    ``values`` (rays, radii) are the image sampled on the rays.  Edge points
    outside the frame (``shape``, full px) or on pixels not ``valid`` (an
    array block-averaged by ``factor``) are left out.
    """
    from scipy import ndimage

    rows, cols = shape
    px = centre[0] + np.outer(np.cos(angles), radii)
    py = centre[1] + np.outer(np.sin(angles), radii)
    inside_frame = (px >= 1) & (px <= cols - 2) & (py >= 1) & (py <= rows - 2)
    if valid is not None:
        inside_frame &= ndimage.map_coordinates(
            valid.astype(float), _to_block(py, px, factor), order=0, mode="nearest") > 0.5
    down = (values[:, :-1] >= half) & (values[:, 1:] < half)
    last = down.shape[1] - 1 - np.argmax(down[:, ::-1], axis=1)
    k = np.arange(len(angles))
    usable = down.any(axis=1) & inside_frame[k, last] & inside_frame[k, last + 1]
    k, j = k[usable], last[usable]
    if len(k) < 20:
        raise InputError("no disk found: too little of a disk edge is visible")
    f = (values[k, j] - half) / (values[k, j] - values[k, j + 1])
    rr = radii[j] + f * (radii[j + 1] - radii[j])
    return centre + rr[:, None] * np.stack([np.cos(angles[k]), np.sin(angles[k])], 1)


def _to_block(py, px, factor):
    """Full-resolution pixel coordinates -> those of a copy block-averaged by ``factor``."""
    return [(py + 0.5) / factor - 0.5, (px + 0.5) / factor - 0.5]


def _robust_circle(edges, radius):
    """RANSAC circle (:class:`skimage.measure.CircleModel`) through edge points."""
    from skimage.measure import CircleModel, ransac

    # the threshold admits an elliptical projector distortion of ~0.5 %
    model, inliers = ransac(edges, CircleModel, min_samples=3,
                            residual_threshold=max(1.5, 0.006 * radius),
                            max_trials=200, stop_probability=0.9999, rng=0)
    if model is None or inliers is None or inliers.sum() < 10:
        raise InputError("no disk found: the bright region is not circular")
    xc, yc, r = _circle(model)
    return np.array([xc, yc]), r, inliers


def _ellipse_disk(edges, centre, passes=3):
    """Disk from edge points: centre, radius and elliptical distortion with sigmas.

    To first order in the distortion the edge point in direction phi from
    the centre lies at r = R + R e1 cos 2phi + R e2 sin 2phi + dx cos phi +
    dy sin phi (dx, dy the centre's correction): linear in (R, R e1, R e2,
    dx, dy), solved by least squares with s^2 (A^T A)^-1 for the covariance;
    points beyond four robust sigmas (lines crossing the rim, dust) are
    dropped and the fit repeated.
    """
    keep = np.ones(len(edges), dtype=bool)
    for _ in range(passes):
        rel = edges - centre
        r = np.hypot(rel[:, 0], rel[:, 1])
        phi = np.arctan2(rel[:, 1], rel[:, 0])
        design = np.stack([np.ones_like(r), np.cos(2 * phi), np.sin(2 * phi), np.cos(phi),
                           np.sin(phi)], axis=1)
        coef, *_ = np.linalg.lstsq(design[keep], r[keep], rcond=None)
        centre = centre + coef[3:5]
        res = r - design @ coef
        scale = 1.4826 * np.median(np.abs(res[keep] - np.median(res[keep])))
        keep = np.abs(res) < max(4 * scale, 0.3)
    rel = edges - centre
    r = np.hypot(rel[:, 0], rel[:, 1])
    phi = np.arctan2(rel[:, 1], rel[:, 0])
    design = np.stack([np.ones_like(r), np.cos(2 * phi), np.sin(2 * phi), np.cos(phi),
                       np.sin(phi)], axis=1)[keep]
    coef, *_ = np.linalg.lstsq(design, r[keep], rcond=None)
    res = r[keep] - design @ coef
    s2 = float(np.sum(res ** 2) / max(keep.sum() - 5, 1))
    # neighbouring rays share pixels and the edge's smoothing: inflate by the
    # AR(1) effective-sample factor (1 + rho) / (1 - rho) of the residuals in
    # angular order
    order = np.argsort(phi[keep])
    ro = res[order]
    rho1 = float(np.sum(ro[1:] * ro[:-1]) / max(np.sum(ro * ro), 1e-300))
    rho1 = min(max(rho1, 0.0), 0.95)
    s2 *= (1 + rho1) / (1 - rho1)
    cov = np.linalg.inv(design.T @ design) * s2
    centre = centre + coef[3:5]
    radius = float(coef[0])
    e = coef[1:3] / radius
    e_sigma = np.sqrt(np.diag(cov)[1:3]) / radius
    sub = cov[1:3, 1:3] / radius ** 2
    chi2 = float(e @ np.linalg.solve(sub, e)) if np.all(np.isfinite(sub)) else 0.0
    return Disk((float(centre[0]), float(centre[1])), radius, float(np.sqrt(np.mean(res ** 2))),
                int(keep.sum()), distortion=(float(e[0]), float(e[1])),
                distortion_sigma=(float(e_sigma[0]), float(e_sigma[1])),
                distortion_significant=bool(chi2 > 9.21))  # chi2(2 dof) at 99 %


def _circle(model):
    if hasattr(model, "center") and hasattr(model, "radius"):
        return float(model.center[0]), float(model.center[1]), float(model.radius)
    xc, yc, r = model.params
    return float(xc), float(yc), float(r)


# ---------------------------------------------------------------------------
# background
# ---------------------------------------------------------------------------

def _window(disk, line_sigma_px):
    """Background window (px): it spans a line with its side fringes several times over."""
    return max(7.0, disk.radius_px / 20.0, 12.0 * line_sigma_px)


def _flatten(image, valid, disk, line_sigma_px=1.0):
    """Relative deficit image (image / background - 1) inside the disk, and its pixel noise.

    The background is a grey closing (which removes dark lines narrower than
    its window) followed by a Gaussian, computed on a block-averaged copy of
    the image when the window is large and brought back to full resolution
    by separable linear interpolation: it follows the smooth disk intensity
    and bands broader than the window without following the lines, and a
    smooth divisor moves no line.  The window grows with the disk and with
    the widest line expected (``line_sigma_px``).  Only the disk's bounding
    box is worked on.
    """
    from scipy import ndimage

    rows, cols = image.shape
    cx, cy, radius = disk.center_px[0], disk.center_px[1], disk.radius_px
    window = _window(disk, line_sigma_px)
    block = max(1, int(window // 6))
    # the disk's bounding box, in whole blocks on the image's own block grid
    r0 = max(0, int(cy - radius) - 1) // block * block
    c0 = max(0, int(cx - radius) - 1) // block * block
    r1 = min(rows, r0 + block * int(math.ceil((min(rows, int(cy + radius) + 2) - r0) / block)))
    c1 = min(cols, c0 + block * int(math.ceil((min(cols, int(cx + radius) + 2) - c0) / block)))
    flat = np.zeros((rows, cols))
    interior = np.zeros((rows, cols), dtype=bool)
    if r1 <= r0 or c1 <= c0:
        raise InputError("no usable pixels inside the disk")
    box = image[r0:r1, c0:c1]
    yy, xx = np.ogrid[r0:r1, c0:c1]
    r2 = (xx - cx) ** 2 + (yy - cy) ** 2
    margin = 4.0  # px inside the fitted rim, clear of the blurred disk edge
    box_valid = valid[r0:r1, c0:c1]
    inner = (r2 < max(radius - margin, 0.0) ** 2) & box_valid
    source = (r2 < max(radius - 2, 0.0) ** 2) & box_valid
    if not np.any(inner):
        raise InputError("no usable pixels inside the disk")
    if block > 1:  # the background is smooth: work on block means
        src_small = _block_mean(source.astype(float), block)
        img_small = _block_mean(np.where(source, box, 0.0), block)
        small_source = src_small > 0.5
        img_small = np.divide(img_small, src_small, out=np.zeros_like(img_small),
                              where=src_small > 0)
    else:
        small_source, img_small = source, box
    if not np.any(small_source):
        raise InputError("no usable pixels inside the disk")
    # outside the disk continue the disk's own level from the nearest inside
    # pixel, so that the background is unbiased up to the rim
    _, (iy, ix) = ndimage.distance_transform_edt(~small_source, return_indices=True)
    filled = img_small[iy, ix]
    size = int(max(3, round(window / block)) | 1)
    closed = ndimage.grey_closing(ndimage.gaussian_filter(filled, 1.0), size=(size, size))
    background = ndimage.gaussian_filter(closed, size / 2.0)
    if block > 1:
        background = _upsample(background, block, box.shape)
    ratio = box / background
    level = np.median(ratio[inner])  # lines cover little of the disk
    flat_box = np.where(inner, ratio / level - 1.0, 0.0)
    flat[r0:r1, c0:c1] = flat_box
    interior[r0:r1, c0:c1] = inner
    every = max(2, int(inner.sum() // 200_000) + 1)  # every other row (or fewer) suffices
    noise = _pixel_noise(flat_box[::every], inner[::every])
    return flat, interior, noise


def _upsample(small, block, shape):
    """Linear interpolation of block means back to full resolution (edge values held)."""
    out = small
    for axis, n in enumerate(shape):
        z = np.clip((np.arange(n) + 0.5) / block - 0.5, 0, small.shape[axis] - 1)
        lo = np.minimum(z.astype(int), small.shape[axis] - 2) if small.shape[axis] > 1 \
            else np.zeros(n, int)
        hi = np.minimum(lo + 1, small.shape[axis] - 1)
        w = z - lo
        if axis == 0:
            out = out[lo] * (1 - w)[:, None] + out[hi] * w[:, None]
        else:
            out = out[:, lo] * (1 - w) + out[:, hi] * w
    return out


# ---------------------------------------------------------------------------
# lines: measurement along given starting loci
# ---------------------------------------------------------------------------

def _distance(rho, ang, kappa, px, py, cx, cy):
    """Signed distance of pixels from the curved line(s); broadcasts over arrays."""
    ca, sa = np.cos(ang), np.sin(ang)
    u, v = px - cx, py - cy
    s = -sa * u + ca * v
    return ca * u + sa * v - rho - kappa * s * s


def _straight(polylines, centre):
    """(rho, angle) of the chord through each polyline's end points, about ``centre``."""
    a, b = polylines[:, 0], polylines[:, -1]
    t = b - a
    ang = np.arctan2(t[:, 0], -t[:, 1])          # normal (cos, sin) = (t_y, -t_x) / |t|
    n = np.stack([np.cos(ang), np.sin(ang)], 1)
    rho = np.sum((0.5 * (a + b) - centre) * n, axis=1)
    return rho, ang


def _segments(polylines, disk, seg_len, margin):
    """Segment centres, unit normals and owners along polylines inside the disk.

    Each polyline is walked at even steps of its point index (the loci are
    sampled evenly along their chords, so this is even in arc length to
    well under a percent); segments whose centre lies within ``margin`` of
    the rim are dropped.
    """
    centre = np.asarray(disk.center_px)
    n_lines, n_pts = polylines.shape[:2]
    if n_lines == 0:
        return np.zeros((0, 2)), np.zeros((0, 2)), np.zeros(0, int)
    length = np.linalg.norm(polylines[:, -1] - polylines[:, 0], axis=1)
    count = np.maximum((length // seg_len).astype(int), 1)
    owner = np.repeat(np.arange(n_lines), count)
    k = np.arange(len(owner)) - np.repeat(np.cumsum(count) - count, count)
    frac = (k + 0.5) / count[owner] * (n_pts - 1)
    i0 = np.clip(np.floor(frac).astype(int), 0, n_pts - 2)
    w = (frac - i0)[:, None]
    pts = (1 - w) * polylines[owner, i0] + w * polylines[owner, i0 + 1]
    tangent = polylines[owner, i0 + 1] - polylines[owner, i0]
    tangent /= np.linalg.norm(tangent, axis=1, keepdims=True)
    normal = np.stack([tangent[:, 1], -tangent[:, 0]], 1)
    inside = np.hypot(*(pts - centre).T) < disk.radius_px - margin
    return pts[inside], normal[inside], owner[inside]


def _other_line_masks(points, normals, owner, rho, ang, keep_out, disk, rank=None):
    """Distances and angles of every straight line from every segment, for masking.

    With ``rank`` (0 = most significant) a line is left out only of the
    profiles of less significant lines, so that a weak spurious start can
    never hide a strong line.
    """
    centre = np.asarray(disk.center_px)
    n = np.stack([np.cos(ang), np.sin(ang)], 1)                    # (J, 2)
    tangents = np.stack([-normals[:, 1], normals[:, 0]], 1)
    dist = (points - centre) @ n.T - rho[None, :]                  # (M, J)
    along_n = normals @ n.T
    along_t = tangents @ n.T
    keep = np.broadcast_to(keep_out, dist.shape).copy()
    keep[np.arange(len(owner)), owner] = 0.0                        # not the line itself
    if rank is not None:
        keep[rank[None, :] >= rank[owner][:, None]] = 0.0
    return dist, along_n, along_t, keep


@dataclass
class _Measured:
    """Per-line results of :func:`_measure_lines` (arrays over the lines sought)."""

    found: np.ndarray           # bool (L,)
    lines: list                 # DetectedLine or None
    z: np.ndarray               # combined significance (L,)


def _measure_lines(flat, interior, disk, noise, polylines, width_px, search_px, *,
                   masks=None, seg_len=None, template=True, min_z=6.0, min_fraction=0.5,
                   screening=False, rim_margin_px=5.0, directions=None, iterations=None,
                   step=None, shape_terms=False):
    """Measure deficit minima along starting loci and fit each line through them.

    Parameters
    ----------
    polylines : ndarray (L, P, 2)
        Starting loci in px (predicted lines, or Hough chords).
    width_px : ndarray (L,)
        Expected Gaussian sigma of each line (px).
    search_px : float
        How far (px) the minimum may lie from the starting locus.
    masks : (rho, angle, keep_out) arrays, optional
        Straight lines whose neighbourhoods are left out of other lines' profiles.
    template : bool
        Locate minima with each line's own template (else the Gaussian centre).
    shape_terms : bool
        Also fit the full Gauss-Hermite series to every profile
        (:func:`laueline.images.lineprofile.fit_profiles`, whose x0 is the
        deficit minimum itself, at most six steps from the Gaussian); each
        line then takes the minima of the route (template or series) whose
        mean position has the smaller variance.
    min_z : float
        Combined significance sqrt(sum z^2) of the segment depths a line needs.
    min_fraction : float
        Fraction of its segments on which a line must be seen: a start that
        merely crosses a real line sees it on one or two segments only.
    screening : bool
        A quick look (samples 2 px apart along segments, fewer iterations)
        for sorting candidates; positions come from a later full pass.
    rim_margin_px : float
        Segments whose centre lies closer than this to the rim are left out.
    iterations : int, optional
        Most Levenberg-Marquardt steps of the profile fits (by default 8 when
        screening, else 20).
    step : float, optional
        Bin width of the profiles across the line (px; by default 1 when
        screening, else 0.5).
    directions : ndarray (L, 2), optional
        A physical direction across each line shared by all of them (the
        predicted g direction in px): the template offsets of the lines are
        then pooled, each taken along its own direction
        (:func:`laueline.images.lineprofile.template_minima`).
    """
    from .lineprofile import fit_line_offsets, fit_profiles, sample_profiles, template_minima

    n_lines = len(polylines)
    width_px = np.broadcast_to(np.asarray(width_px, float), (n_lines,))
    empty = _Measured(np.zeros(n_lines, bool), [None] * n_lines, np.zeros(n_lines))
    if n_lines == 0:
        return empty
    sigma_max = float(np.max(width_px))
    seg_len = seg_len or float(np.clip(4.0 * sigma_max, 12.0, 32.0))
    half = search_px + 4.0 * width_px + 2.0
    points, normals, owner = _segments(polylines, disk, seg_len, rim_margin_px)
    if not len(owner):
        return empty
    others = None
    if masks is not None:
        rho_m, ang_m, keep_m = masks[:3]
        others = _other_line_masks(points, normals, owner, rho_m, ang_m, keep_m, disk,
                                   masks[3] if len(masks) > 3 else None)
    d, profile, count, crowded = sample_profiles(flat, interior, points, normals, half[owner],
                                        seg_len, others, step=step or (1.0 if screening else 0.5))
    fit = fit_profiles(d, profile, count, 0.0, width_px[owner], noise, search=search_px,
                       max_width=max(3.0 * sigma_max, 4.0), shape_terms=shape_terms,
                       iterations=iterations or (8 if screening else 20),
                       shape_iterations=6 if shape_terms else None)
    series = fit if shape_terms else None
    fit = fit.gaussian if shape_terms else fit
    z_seg = np.where(fit.ok, fit.depth / np.maximum(fit.depth_sigma, 1e-12), 0.0)
    if template:
        orientation = None
        if directions is not None:
            orientation = np.bincount(owner, np.sum(normals * directions[owner], axis=1),
                                      minlength=n_lines)
        minimum, var, ok_t, _, template_var = template_minima(
            d, profile, count, owner, _with_ok(fit, z_seg > 2.0), noise, clean=~crowded,
            refit=False, orientation=orientation)
    else:
        minimum, var, ok_t = fit.minimum, fit.minimum_var, fit.ok
        template_var = np.zeros(n_lines)
    ok = ok_t & fit.ok & (z_seg > 2.0) & (np.abs(minimum) <= search_px + 1.0)
    if series is not None:
        # each line takes the route whose mean position is the less uncertain:
        # the Gaussian centres plus the template's offset (which carries the
        # template's own variance, and for weak lines leans on the others), or
        # the minima of the Gauss-Hermite series fitted to each profile
        ok_s = series.ok & (z_seg > 2.0) & (np.abs(series.minimum) <= search_px + 1.0)
        inv_t = np.bincount(owner, np.where(ok, 1.0 / np.where(ok, var, 1.0), 0.0),
                            minlength=n_lines)
        inv_s = np.bincount(owner, np.where(ok_s, 1.0 / np.where(ok_s, series.minimum_var, 1.0),
                                            0.0), minlength=n_lines)
        var_t = np.where(inv_t > 0, 1.0 / np.maximum(inv_t, 1e-300), np.inf) + \
            np.where(np.isfinite(template_var), template_var, np.inf)
        var_s = np.where(inv_s > 0, 1.0 / np.maximum(inv_s, 1e-300), np.inf)
        own = (var_s < var_t)[owner]
        minimum = np.where(own, series.minimum, minimum)
        var = np.where(own, series.minimum_var, var)
        ok = np.where(own, ok_s, ok)
        template_var = np.where(var_s < var_t, 0.0, template_var)
    z_line = np.sqrt(np.bincount(owner, np.where(ok, z_seg, 0.0) ** 2, minlength=n_lines))
    centre = np.asarray(disk.center_px)
    rho0, ang0 = _straight(polylines, centre)
    # in each line's straight frame: offset along its normal against s along it
    q = points + minimum[:, None] * normals
    n0 = np.stack([np.cos(ang0), np.sin(ang0)], 1)[owner]
    m0 = np.stack([-n0[:, 1], n0[:, 0]], 1)
    off = np.sum((q - centre) * n0, axis=1)
    s = np.sum((q - centre) * m0, axis=1)
    var_n = var / np.maximum(np.sum(normals * n0, axis=1) ** 2, 0.25)
    counts = np.bincount(owner, minlength=n_lines)
    k_max = int(counts.max())
    slot = np.arange(len(owner)) - np.repeat(np.cumsum(counts) - counts, counts)
    grid = np.zeros((n_lines, k_max))
    s_g, off_g, var_g, ok_g = grid.copy(), grid.copy(), np.ones_like(grid), \
        np.zeros_like(grid, bool)
    s_g[owner, slot], off_g[owner, slot] = s, off
    var_g[owner, slot] = np.where(ok, var_n, 1.0)
    ok_g[owner, slot] = ok
    # no segment may outweigh four typical ones of its line: a profile locked
    # onto a crossing or a speck can claim a tiny variance and would otherwise
    # pull the whole line (and widen the outlier gate) before it is rejected
    typical = _row_median(var_g, ok_g)
    var_g = np.maximum(var_g, 0.25 * typical[:, None])
    span = np.sqrt(np.maximum(disk.radius_px ** 2 - rho0 ** 2, 1.0))
    for k in range(3):
        # first with no segment weighing more than a typical one of its line, so
        # that none can drag the line (and with it the outlier gate) before the
        # gate has seen it; then with
        # each segment's own variance, twice without segments beyond four
        # sigmas (crossings, dust).  Exact loci bend by hundredths of a pixel
        # over a chord of a few hundred pixels; a prior sagitta of 2.5e-4 of
        # the disk radius keeps a line measured on part of its chord from
        # being bent at its ends
        weights = var_g if k else np.maximum(var_g, typical[:, None])
        coef, cov, chi2, dof = fit_line_offsets(s_g, off_g, weights, ok_g, span,
                                                curvature_sagitta_px=2.5e-4 * disk.radius_px)
        if k == 2:
            break
        design = np.stack([np.ones_like(s_g), s_g, s_g * s_g], 2)
        resid = off_g - np.einsum("lki,li->lk", design, coef)
        # a robust scale (median absolute normalised residual) so that the
        # outliers themselves cannot widen the gate
        norm = np.abs(resid) / np.sqrt(var_g)
        scale = np.where(ok_g.any(axis=1), 1.4826 * _row_median(norm, ok_g), 1.0)
        ok_g &= np.abs(resid) < 4.0 * np.sqrt(var_g) * np.maximum(scale, 1.0)[:, None]
    # the template's minimum is common to every segment of a line: its
    # variance adds to the line's offset, not to the segments' scatter
    cov[:, 0, 0] += np.where(np.isfinite(template_var), template_var, 0.0)
    n_ok = ok_g.sum(axis=1)
    # segments whose core was not left out (near other lines) are the ones that count
    core = np.abs(d) <= 1.0 + width_px[owner][:, None]
    open_core = np.all((count > 0) | ~core, axis=1)
    available = np.maximum(np.bincount(owner, open_core, minlength=n_lines), 1)
    found = (n_ok >= 3) & (n_ok >= min_fraction * available) & (z_line >= min_z) & \
        np.all(np.isfinite(coef), axis=1)
    lines = [None] * n_lines
    depth_line = np.bincount(owner, np.where(ok, fit.depth, 0.0), minlength=n_lines) / \
        np.maximum(np.bincount(owner, ok, minlength=n_lines), 1)
    width_line = np.bincount(owner, np.where(ok, fit.width, 0.0), minlength=n_lines) / \
        np.maximum(np.bincount(owner, ok, minlength=n_lines), 1)
    npx = np.bincount(owner, count.sum(axis=1), minlength=n_lines)
    for i in np.flatnonzero(found):  # assembling result objects, not computing
        r_, beta, kappa = coef[i]
        g = 1.0 + beta * beta
        rho, ang, kap = r_ / math.sqrt(g), ang0[i] - math.atan(beta), kappa / g ** 1.5
        jac = np.array([[1 / math.sqrt(g), -r_ * beta / g ** 1.5, 0.0],
                        [0.0, -1.0 / g, 0.0],
                        [0.0, -3 * kappa * beta / g ** 2.5, 1.0 / g ** 1.5]])
        sel_idx = np.flatnonzero(owner == i)[ok_g[i, :counts[i]]]
        lines[i] = _new_line(rho, ang, kap, jac @ cov[i] @ jac.T, depth_line[i],
                             width_line[i] * _FWHM, float(z_line[i]), int(npx[i]), disk,
                             minima_px=q[sel_idx], minima_sigma_px=np.sqrt(var[sel_idx]),
                             minima_normal=normals[sel_idx])
    return _Measured(found, lines, z_line)


def _row_median(values, use):
    """Median of each row over its entries where ``use`` (0 for rows without any)."""
    from .lineprofile import _masked_median

    return _masked_median(values, use)


def _with_ok(fit, ok):
    from .lineprofile import ProfileFit

    return ProfileFit(fit.minimum, fit.minimum_var, fit.depth, fit.depth_sigma, fit.width,
                      fit.asymmetry, fit.fringe, fit.ok & ok, fit.params)


def _new_line(rho, ang, kappa, cov3, depth, width_px, snr, npx, disk, **extra):
    """A DetectedLine with a non-negative offset and angle in (-pi, pi]."""
    if rho < 0:
        rho, ang, kappa = -rho, ang + np.pi, -kappa
        flip = np.diag([-1.0, 1.0, -1.0])
        cov3 = flip @ cov3 @ flip
    ang = (ang + np.pi) % (2 * np.pi) - np.pi
    cx, cy = disk.center_px
    span = math.sqrt(max(disk.radius_px ** 2 - rho ** 2, 0.0))
    s = np.linspace(-span, span, 64)
    ca, sa = math.cos(ang), math.sin(ang)
    offset = rho + kappa * s * s
    pts = np.stack([cx + offset * ca - s * sa, cy + offset * sa + s * ca], axis=1)
    inside = np.hypot(pts[:, 0] - cx, pts[:, 1] - cy) <= disk.radius_px + 1e-9
    return DetectedLine(float(math.degrees(ang)), float(rho), float(kappa), float(depth),
                        float(width_px), cov3, float(snr), pts[inside], int(npx), **extra)


def _chords(rho, ang, disk, n_points=64):
    """Straight chords (L, P, 2) px of lines (rho, angle) about the disk centre."""
    cx, cy = disk.center_px
    span = np.sqrt(np.maximum(disk.radius_px ** 2 - rho ** 2, 0.0))
    t = np.linspace(-1, 1, n_points)[None, :] * span[:, None]
    ca, sa = np.cos(ang)[:, None], np.sin(ang)[:, None]
    return np.stack([cx + rho[:, None] * ca - t * sa, cy + rho[:, None] * sa + t * ca], axis=2)


def _line_polylines(lines, disk):
    """Curved loci (L, 64, 2) of detected lines across the whole chord."""
    if not lines:
        return np.zeros((0, 64, 2))
    par = np.array([[ln.offset_px, math.radians(ln.normal_angle_deg), ln.curvature_per_px]
                    for ln in lines])
    chords = _chords(par[:, 0], par[:, 1], disk)
    cx, cy = disk.center_px
    n = np.stack([np.cos(par[:, 1]), np.sin(par[:, 1])], 1)[:, None, :]
    m = np.stack([-np.sin(par[:, 1]), np.cos(par[:, 1])], 1)[:, None, :]
    s = np.sum((chords - [cx, cy]) * m, axis=2)
    return chords + (par[:, 2, None] * s * s)[..., None] * n


# ---------------------------------------------------------------------------
# blind search
# ---------------------------------------------------------------------------

def _blind_candidates(flat, interior, disk, noise):
    """Lines of the flattened image found without a prediction, in full-resolution px.

    The search runs on a block-averaged copy whose disk is about 128 to 256
    px in radius (the full image for disks up to 256 px), where it costs the
    same whatever the image size: Hough candidates at several scales
    (:func:`_hough_candidates`), each screened by quick Gaussian fits on long
    segments.  The factor follows the line width: when the lines found are
    narrow for the blocks (Gaussian sigma under 0.8 block), the search is
    repeated on a finer copy so that narrow weak lines are not averaged
    away.  Positions are good to a fraction of a block; they are measured
    again at full resolution.

    Returns
    -------
    lines : list of DetectedLine
    factor : int
        The block size of the copy searched.
    """
    factor, max_level = 1, 8
    while disk.radius_px / (2 * factor) >= 128:
        factor *= 2
    while True:
        lines = _screened_candidates(flat, interior, disk, noise, factor, max_level)
        sigma = np.median([ln.width_px / _FWHM for ln in lines]) if lines else 0.0
        if factor == 1 or (lines and sigma >= 0.8 * factor):
            return lines, factor
        factor = max(1, factor // 2 if not lines else
                     min(factor // 2, 2 ** int(math.floor(math.log2(max(sigma / 0.8, 1.0))))))
        # the lines are narrow for the blocks: the finer search need not look
        # for wide ones (Gaussian sigma beyond about two of its pixels)
        max_level = 2


def _screened_candidates(flat, interior, disk, noise, factor, max_level=8):
    """Hough candidates screened on the copy block-averaged by ``factor`` (full px out)."""
    cx, cy = disk.center_px
    if factor > 1:
        small, inside = _block_mean(flat, factor), _block_all(interior, factor)
        level_disk = Disk(((cx + 0.5) / factor - 0.5, (cy + 0.5) / factor - 0.5),
                          disk.radius_px / factor)
        level_noise = _pixel_noise(small, inside)
    else:
        small, inside, level_disk, level_noise = flat, interior, disk, noise
    cand = _hough_candidates(small, inside, level_disk, level_noise, min_chord_px=20.0 / factor,
                             max_level=max_level)
    if not len(cand):
        return []
    # coarse screening: candidates alone, Gaussian positions, long segments
    cand = cand[np.argsort(-cand[:, 3])]
    first = _measure_lines(small, inside, level_disk, level_noise,
                           _chords(cand[:, 0], cand[:, 1], level_disk), cand[:, 2],
                           1.0 + cand[:, 2].max(), template=False, seg_len=16.0, min_z=8.0,
                           screening=True, rim_margin_px=max(1.0, 5.0 / factor))
    lines = _merge([ln for ln in first.lines if ln is not None], level_disk)
    if factor == 1:
        return lines
    out = []
    scale = np.diag([float(factor), 1.0, 1.0 / factor])
    for ln in lines:
        # a box of `factor` px adds factor^2 / 12 to a line's variance across it
        sig_c = ln.width_px / _FWHM
        sig = factor * math.sqrt(max(sig_c ** 2 - (1 - 1 / factor ** 2) / 12,
                                     0.25 * sig_c ** 2))
        out.append(_new_line(ln.offset_px * factor, math.radians(ln.normal_angle_deg),
                             ln.curvature_per_px / factor, scale @ ln.covariance @ scale,
                             ln.depth, sig * _FWHM, ln.snr, ln.n_pixels * factor ** 2, disk))
    return out


def _block_all(mask, factor):
    """True for blocks of factor x factor pixels that are all True."""
    if factor == 1:
        return mask
    r, c = mask.shape[0] // factor * factor, mask.shape[1] // factor * factor
    return mask[:r, :c].reshape(r // factor, factor, c // factor, factor).all(axis=(1, 3))


def _pixel_noise(flat, interior):
    """Pixel noise from differences of pixels two columns apart: MAD / 0.6745 / sqrt(2).

    Two columns apart is beyond the reach of a detector blur; lines are rare,
    so the median ignores them.
    """
    diff = (flat[:, 2:] - flat[:, :-2])[interior[:, 2:] & interior[:, :-2]]
    if not len(diff):
        return 1e-3
    noise = float(1.4826 * np.median(np.abs(diff - np.median(diff))) / math.sqrt(2))
    return max(noise, 1e-3)  # noiseless (rendered) images: 0.1 % keeps thresholds sane


def _hough_candidates(flat, interior, disk, noise, min_chord_px=20.0, max_level=8):
    """Line candidates (rho, angle, sigma_px) from a Hough transform at several scales.

    Lines from under 2 to 15 px wide: the flattened image is block-averaged
    by 1, 2, 4 (and 8 for large disks), so that a line is one to three
    pixels wide at some level; at each level the pixels darker than three
    noise sigmas after a unit Gaussian are accumulated
    (:func:`skimage.transform.hough_line`), normalised by the count expected
    from noise along each chord so that short chords near the rim compete
    fairly, and every local maximum above six sigmas is kept (no fixed cap:
    the count grows with the pattern, not with the image size).  Chords
    shorter than ``min_chord_px`` (of ``flat``'s pixels) are not sought, nor
    levels beyond ``max_level``.
    """
    from scipy import ndimage
    from skimage.feature import peak_local_max
    from skimage.transform import hough_line

    out = []
    factor = 1
    rows, cols = flat.shape
    while disk.radius_px / factor >= 40 and factor <= max_level:
        if factor == 1:
            f_small, i_small = flat, interior
        else:
            r_rows, r_cols = rows // factor * factor, cols // factor * factor
            shape = (r_rows // factor, factor, r_cols // factor, factor)
            f_small = flat[:r_rows, :r_cols].reshape(shape).mean(axis=(1, 3))
            i_small = interior[:r_rows, :r_cols].reshape(shape).all(axis=(1, 3))
        level_noise = noise / factor  # block means of (nearly) independent pixels
        smooth = ndimage.gaussian_filter(f_small, 1.0)
        ridge = (-smooth > 3.0 * level_noise / (2 * math.sqrt(math.pi))) & i_small
        n_theta = int(np.clip(np.pi * disk.radius_px / factor, 180, 720))
        theta = np.linspace(-np.pi / 2, np.pi / 2, n_theta, endpoint=False)
        acc, angles, dists = hough_line(ridge, theta=theta)
        p = ridge.sum() / max(i_small.sum(), 1)
        c_small = ((disk.center_px[0] + 0.5) / factor - 0.5,
                   (disk.center_px[1] + 0.5) / factor - 0.5)
        rho_c = dists[:, None] - (c_small[0] * np.cos(angles) + c_small[1] * np.sin(angles))[None]
        chord = 2 * np.sqrt(np.clip((disk.radius_px / factor) ** 2 - rho_c ** 2, 0, None))
        expected = p * chord
        z = (acc - expected) / np.sqrt(expected + 1.0)
        z[chord < min_chord_px / factor] = 0
        peaks = peak_local_max(z, min_distance=3, threshold_abs=6.0, exclude_border=False)
        if len(peaks):
            i, j = peaks[:, 0], peaks[:, 1]
            out.append(np.stack([rho_c[i, j] * factor, angles[j], np.full(len(i), factor * 1.0),
                                 z[i, j]], 1))
        factor *= 2
    if not out:
        return np.zeros((0, 4))
    return np.concatenate(out)


def _merge(lines, disk):
    """Keep the most significant of lines that trace the same feature."""
    order = sorted(range(len(lines)), key=lambda i: -lines[i].snr)
    lines = [lines[i] for i in order]
    if not lines:
        return lines
    par = [[ln.offset_px, math.radians(ln.normal_angle_deg), ln.curvature_per_px]
           for ln in lines]
    gap = _gap_matrix(par, disk)
    width = np.array([ln.width_px for ln in lines])
    kept = []
    for i in range(len(lines)):
        if not any(gap[i, j] < max(2.0, width[j]) for j in kept):
            kept.append(i)
    return [lines[i] for i in kept]


def _prepare(image, disk, saturation, warnings):
    """Saturated pixels, the disk and the frame check shared by both detections."""
    from scipy import ndimage

    image = np.asarray(image, dtype=float)
    rows, cols = image.shape
    top = image.max()
    at_top = image >= top
    saturated = np.zeros_like(at_top)
    if (saturation is not None and top >= saturation) or at_top.sum() > max(20, 1e-4 * image.size):
        saturated = ndimage.binary_dilation(at_top, iterations=1)
        warnings.append(f"{int(at_top.sum())} saturated pixels (value {top:g}) left out")
    valid = ~saturated
    if disk is None:
        disk = find_disk(image, valid)
    elif not isinstance(disk, Disk):
        x, y, r = (float(v) for v in disk)
        if not r > 0:
            raise InputError("the disk radius must be positive")
        disk = Disk((x, y), r, given=True)
    cx, cy = disk.center_px
    if not (-disk.radius_px + 5 < cx < cols + disk.radius_px - 5
            and -disk.radius_px + 5 < cy < rows + disk.radius_px - 5):
        raise InputError("the disk lies outside the image")
    frac_in_frame = _fraction_in_frame(disk, rows, cols)
    if frac_in_frame < 0.98:
        warnings.append(f"the disk is partly outside the frame ({100 * (1 - frac_in_frame):.0f} "
                        "% of its area): lines are fitted where visible")
    if disk.distortion_significant:
        e = math.hypot(*disk.distortion)
        warnings.append(f"the disk is elliptical by {100 * e:.2f} % (e1 {disk.distortion[0]:.5f}"
                        f" +- {disk.distortion_sigma[0]:.5f}, e2 {disk.distortion[1]:.5f} +- "
                        f"{disk.distortion_sigma[1]:.5f}): projector distortion")
    return image, valid, disk, int(at_top.sum()) if saturated.any() else 0


def detect_lines(image, *, disk=None, saturation=None, min_angle_deg=5.0, source=""):
    """Detect the central disk, its deficit lines and their crossings without a prediction.

    Parameters
    ----------
    image : ndarray (rows, cols)
    disk : (x, y, radius) in px or Disk, optional
        Skip the disk search.
    saturation : float, optional
        Pixel value at which the detector saturates (the integer maximum of
        the file type); pixels at that value are left out.
    min_angle_deg : float
        Crossings of lines meeting at a smaller angle are not reported.

    Returns
    -------
    Detection

    Notes
    -----
    Candidates come from Hough transforms of a pyramid, each screened at its
    own scale (:func:`_blind_candidates`); each is measured by profiles across it on
    short segments (:mod:`laueline.images.lineprofile`): a Gaussian dip for
    a first position, then the line's own template for the position of the
    deficit minimum; a curved line is fitted through the segment minima.
    Lines are then measured again with the neighbourhoods of all other lines
    left out of their profiles.
    """
    warnings = []
    image, valid, disk, n_saturated = _prepare(image, disk, saturation, warnings)
    rows, cols = image.shape
    flat, interior, noise = _flatten(image, valid, disk, 1.0)
    lines, factor = _blind_candidates(flat, interior, disk, noise)
    if lines:  # the background window from the widest line seen
        flat, interior, noise = _flatten(image, valid, disk,
                                         float(np.max([ln.width_px for ln in lines])) / _FWHM)
    for rounds in range(2):
        if not lines:
            break
        lines.sort(key=lambda ln: -ln.snr)
        sig = np.array([ln.width_px / _FWHM for ln in lines])
        # first round: a line hides only weaker ones (spurious starts are weak);
        # second round: every line hides every other
        masks = (np.array([ln.offset_px for ln in lines]),
                 np.radians([ln.normal_angle_deg for ln in lines]), 2.5 * sig + 1.5,
                 np.arange(len(lines)) if rounds == 0 else None)
        # the first round starts from positions good to a fraction of a block
        search = 1.5 + 0.5 * (factor - 1) if rounds == 0 else 1.5
        again = _measure_lines(flat, interior, disk, noise, _line_polylines(lines, disk), sig,
                               search, masks=masks, min_z=8.0, min_fraction=0.25)
        lines = _merge([ln for ln in again.lines if ln is not None], disk)
    _flag_lines(lines, image, valid, disk, warnings)
    lines.sort(key=lambda ln: -ln.snr)
    pairs, xy, sig, ang = _crossings(lines, disk, min_angle_deg)
    if len([ln for ln in lines if not ln.flag]) < 2:
        warnings.append("fewer than two lines found in the disk")
    return Detection(shape=(rows, cols), disk=disk, lines=lines, crossing_lines=pairs,
                     crossing_px=xy, crossing_sigma_px=sig, crossing_angle_deg=ang,
                     noise=noise, saturated_px=n_saturated, warnings=warnings,
                     source=str(source))


# ---------------------------------------------------------------------------
# seeded search
# ---------------------------------------------------------------------------

def detect_seeded(image, pattern, detector, *, disk=None, saturation=None, search_px=3.0,
                  line_width_px=None, min_z=5.0, min_angle_deg=5.0, source=""):
    """Measure the lines of a predicted pattern in an image.

    Parameters
    ----------
    image : ndarray (rows, cols)
    pattern : laueline.lines.Pattern
        The prediction (:func:`laueline.lines.predict`); its exact loci,
        mapped to pixels by ``detector`` (centre, scale, rotation, mirror and
        elliptical distortion), are where the lines are sought.
    detector : laueline.detector.Detector
    disk : (x, y, radius) px or Disk, optional
        By default found in the image.
    search_px : float
        How far (px) a measured minimum may lie from its predicted locus.
    line_width_px : float, optional
        Expected Gaussian sigma of the lines (px); by default estimated from
        the image.
    min_z : float
        Combined significance a line needs to count as found (weak lines
        are found where expected, so this can be lower than blind).

    Returns
    -------
    Detection
        Lines in the order of ``pattern`` (those found), each with its
        ``hkl``, the measured minima on every segment (``minima_px``) and
        their covariances (``minima_covariance_px``); ``missing`` lists the
        predicted lines not found.
    """
    warnings = []
    image, valid, disk, n_saturated = _prepare(image, disk, saturation, warnings)
    rows, cols = image.shape
    polylines = detector.to_pixels(np.asarray(pattern.points_mrad, float))
    if line_width_px is None:
        flat, interior, noise = _flatten(image, valid, disk, 1.0)
        probe = _measure_lines(flat, interior, disk, noise, polylines, 1.5, search_px + 2.0,
                               template=False, seg_len=24.0, min_z=min_z, screening=True)
        widths = [ln.width_px / _FWHM for ln in probe.lines if ln is not None]
        sigma = float(np.median(widths)) if widths else 1.5
        widest = float(np.max(widths)) if widths else sigma
        if _window(disk, widest) > _window(disk, 1.0):  # a wider background window
            flat, interior, noise = _flatten(image, valid, disk, widest)
    else:
        sigma = float(line_width_px)
        flat, interior, noise = _flatten(image, valid, disk, sigma)
    rho, ang = _straight(polylines, np.asarray(disk.center_px))
    # a predicted line hides only weaker predicted ones: a line predicted but
    # not there (dynamically extinguished) must not hide a stronger one
    rank = np.argsort(np.argsort(-np.asarray(pattern.strength, float)))
    masks = (rho, ang, np.full(len(rho), 2.5 * sigma + 1.5), rank)
    # the direction of g in px: a shared physical orientation across every line
    directions = np.asarray(pattern.normal, float) @ np.asarray(detector.matrix).T
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    # this pass finds the lines and starts the next one: its fits need not
    # settle to the last thousandth of a pixel (its fine bins keep the
    # faintest lines: 1 px bins lose some of 3 % contrast at 3000 counts)
    measured = _measure_lines(flat, interior, disk, noise, polylines, sigma, search_px,
                              masks=masks, min_z=min_z, min_fraction=0.4,
                              directions=directions, iterations=10)
    # once more from where the lines were found, with each line's own width and
    # only the lines actually seen left out of the others' profiles
    found = np.flatnonzero(measured.found)
    if len(found):
        seen = [measured.lines[i] for i in found]
        sig = np.array([ln.width_px / _FWHM for ln in seen])
        rank = np.argsort(np.argsort([-ln.snr for ln in seen]))  # weak lines hide no strong one
        masks = (np.array([ln.offset_px for ln in seen]),
                 np.radians([ln.normal_angle_deg for ln in seen]), 2.5 * sig + 1.5, rank)
        # here a line measured well enough takes each profile's minimum from
        # its own Gauss-Hermite fit: the template offsets pooled in the first
        # pass assume one profile shape (in units of the width) for all lines,
        # which dynamical lines, each with its own asymmetry and fringes, do
        # not share.  The profiles start from positions found to a fraction of
        # a pixel: ten Gaussian steps suffice, and six with the shape terms
        # free (more let a profile cut short by a line crossing at a small
        # angle, its core left out, drift with its shape terms)
        again = _measure_lines(flat, interior, disk, noise, _line_polylines(seen, disk), sig,
                               1.5, masks=masks, min_z=min_z, min_fraction=0.25,
                               directions=directions[found], shape_terms=True, iterations=10)
        for k, i in enumerate(found):
            measured.lines[i] = again.lines[k] if again.found[k] else measured.lines[i]
    lines, missing = [], []
    for i, ln in enumerate(measured.lines):
        hkl = tuple(int(v) for v in pattern.hkl[i])
        if ln is None:
            missing.append(hkl)
        else:
            ln.hkl = hkl
            lines.append(ln)
    if missing:
        warnings.append(f"{len(missing)} predicted lines not found: "
                        + ", ".join(" ".join(map(str, h)) for h in missing[:8])
                        + (" ..." if len(missing) > 8 else ""))
    pairs, xy, sig, ang_c = _crossings(lines, disk, min_angle_deg)
    return Detection(shape=(rows, cols), disk=disk, lines=lines, crossing_lines=pairs,
                     crossing_px=xy, crossing_sigma_px=sig, crossing_angle_deg=ang_c,
                     noise=noise, saturated_px=n_saturated, warnings=warnings,
                     source=str(source), missing=missing)


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
