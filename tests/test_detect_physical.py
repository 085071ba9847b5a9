"""Line finding on patterns laueline did not draw: two-beam profiles, bands, distortion, noise.

The patterns come from tests/physical_render.py (its own pixel mapping,
two-beam rocking-curve profiles, a broad band, an elliptical projector
distortion, a point-spread function and Poisson noise); only the loci are
laueline's (the geometry is not under test).  The true position of a line is
the minimum of its blurred profile.
"""

import math

import numpy as np
import pytest
from scipy.special import erfc
from physical_render import PhysicalSettings, render_physical

from laueline import read_crystal
from laueline.detector import Detector
from laueline.images.detect import detect_lines, detect_seeded, find_disk

SI = read_crystal("Si")
ZONE, X_AXIS = (2, 3, 0), (0, 0, 4)
DISTORTION = (0.003, -0.002)   # a few tenths of a percent, as projector lenses give


def _line_distance(line, points, disk):
    """Distances (px) of points from a detected (curved) line."""
    c = np.asarray(disk.center_px)
    a = math.radians(line.normal_angle_deg)
    n, m = np.array([math.cos(a), math.sin(a)]), np.array([-math.sin(a), math.cos(a)])
    u = points - c
    s = u @ m
    return u @ n - line.offset_px - line.curvature_per_px * s * s


def _resolvable(truth, min_contrast, min_chord_px=60.0, margin_px=12.0):
    """Truth lines a detector should resolve: contrast and a long enough chord.

    A line is also unresolvable when another drawn line runs within two
    line widths of it along most of its chord (they merge into one dip).
    """
    c, r = truth["center_px"], truth["radius_px"] - margin_px
    out = []
    for tl in truth["lines"]:
        pts = tl["minima_px"][np.hypot(*(tl["minima_px"] - c).T) < r]
        if len(pts) >= 4 and np.linalg.norm(pts[-1] - pts[0]) >= min_chord_px \
                and tl["contrast"] >= min_contrast:
            out.append((tl["hkl"], pts))
    return out


def _match(det, truth, min_contrast):
    """rms error (px) of each resolvable truth line against its best detected line."""
    errors, used = {}, set()
    for hkl, pts in _resolvable(truth, min_contrast):
        if not det.lines:
            errors[hkl] = np.inf
            continue
        rms = [math.sqrt(np.mean(_line_distance(ln, pts, det.disk) ** 2)) for ln in det.lines]
        best = int(np.argmin(rms))
        errors[hkl] = rms[best]
        used.add(best)
    # a detected line is spurious when it traces no drawn line at all
    drawn = [tl["minima_px"] for tl in truth["lines"]]
    spurious = 0
    for ln in (det.lines[i] for i in det.good_lines):
        near = [np.median(np.abs(_line_distance(ln, p[np.hypot(*(p - det.disk.center_px).T)
                                                      < det.disk.radius_px - 12], det.disk)))
                for p in drawn]
        spurious += min(near) > 1.5
    return errors, spurious


@pytest.fixture(scope="module")
def distorted():
    st = PhysicalSettings(distortion=DISTORTION, seed=11)
    return render_physical(SI, ZONE, 200, 6, st, x_axis=X_AXIS)


def test_blind_detection_of_two_beam_profiles(distorted):
    image, truth = distorted
    det = detect_lines(image)
    # lines of 8 % contrast and more over a 60-px chord: the blind search's reach
    errors, spurious = _match(det, truth, min_contrast=0.08)
    values = np.array(list(errors.values()))
    assert len(values) >= 10
    assert np.all(values < 0.5), errors       # every resolvable line found
    # the target: positions within 0.1 px rms of the true minima
    assert math.sqrt(np.mean(values ** 2)) < 0.1, errors
    assert spurious == 0


def test_seeded_detection_finds_weak_lines(distorted):
    image, truth = distorted
    st = PhysicalSettings(distortion=DISTORTION)
    scale = truth["scale_px_per_mrad"]
    detector = Detector(tuple(truth["center_px"]), scale, st.rotation_deg, st.mirror, DISTORTION)
    det = detect_seeded(image, truth["pattern"], detector)
    # lines of 8 % contrast and more: positions within 0.1 px rms of the true minima
    strong, spurious = _match(det, truth, min_contrast=0.08)
    values = np.array(list(strong.values()))
    assert len(values) >= 10 and np.all(values < 0.5), strong
    assert math.sqrt(np.mean(values ** 2)) < 0.1, strong
    assert spurious == 0
    # lines of 3 to 8 % contrast: most are found where the prediction says (the
    # faintest, 3 %, crossing many others, not always); at this dose their
    # positions are good to about half a pixel only (one pixel allowed here)
    errors, _ = _match(det, truth, min_contrast=0.03)
    weak_errors = np.array([e for h, e in errors.items() if h not in strong])
    assert np.sum(weak_errors < 1.0) >= 3, errors
    blind = detect_lines(image)
    weak = [h for h, e in errors.items()
            if min(math.sqrt(np.mean(_line_distance(ln, p, blind.disk) ** 2))
                   for ln in blind.lines for hh, p in _resolvable(truth, 0.0) if hh == h) > 1.0]
    assert weak, "the prediction finds lines the blind search misses"
    # every line carries its hkl, its minima and their covariances
    for ln in det.lines:
        assert ln.hkl is not None and len(ln.minima_px) >= 3
        assert ln.minima_covariance_px.shape == (len(ln.minima_px), 2, 2)


def test_seeded_minima_uncertainties_match_their_scatter(distorted):
    image, truth = distorted
    st = PhysicalSettings(distortion=DISTORTION)
    detector = Detector(tuple(truth["center_px"]), truth["scale_px_per_mrad"], st.rotation_deg,
                        st.mirror, DISTORTION)
    det = detect_seeded(image, truth["pattern"], detector)
    z = []
    lookup = {tl["hkl"]: tl["minima_px"] for tl in truth["lines"]}
    for ln in det.lines:
        pts = lookup[ln.hkl]
        for q, n, s in zip(ln.minima_px, ln.minima_normal, ln.minima_sigma_px):
            j = int(np.clip(np.argmin(np.linalg.norm(pts - q, axis=1)), 1, len(pts) - 2))
            t = pts[j + 1] - pts[j - 1]
            normal = np.array([t[1], -t[0]]) / np.linalg.norm(t)
            z.append(((q - pts[j]) @ normal) / s)
    z = np.array(z)
    # robust spread of the normalised errors (segments by crossings may be outliers):
    # near 1 when the stated sigmas are honest.  Below 1 they are conservative:
    # the correlation correction of a profile's residuals also counts the misfit
    # of the Gaussian to a two-beam profile (up to a factor 2 allowed); above 1
    # the template's common offset, carried by the line and not by its
    # segments, shows (up to 1.8 allowed)
    spread = 1.4826 * np.median(np.abs(z - np.median(z)))
    assert len(z) > 100 and 0.45 < spread < 1.8, spread


def test_distortion_from_the_disk_outline(distorted):
    image, truth = distorted
    disk = find_disk(image)
    e, s = np.array(disk.distortion), np.array(disk.distortion_sigma)
    assert disk.distortion_significant
    # within 3 sigma of the drawn distortion (the sigma includes the correlation of
    # neighbouring edge rays), and that sigma small against the distortion itself
    assert np.all(np.abs(e - DISTORTION) < 3 * s), (e, s)
    assert np.all(s < 0.001)
    # an independent estimator: scikit-image's algebraic ellipse fit of the same
    # edge, semi-axes a, b -> |e| = (a - b) / (a + b)
    from skimage.feature import canny
    from skimage.measure import EllipseModel

    edges = np.argwhere(canny(image / image.max(), sigma=2.0))[:, ::-1].astype(float)
    edges = edges[np.abs(np.hypot(*(edges - disk.center_px).T) - disk.radius_px) < 3]
    if hasattr(EllipseModel, "from_estimate"):
        model = EllipseModel.from_estimate(edges)
        a, b = model.axis_lengths if hasattr(model, "axis_lengths") else model.params[2:4]
    else:
        model = EllipseModel()
        model.estimate(edges)
        a, b = model.params[2:4]
    a, b = max(a, b), min(a, b)
    # the pixel-level canny edge is coarser: agreement within 0.1 %
    assert abs((a - b) / (a + b) - math.hypot(*disk.distortion)) < 1e-3


def test_round_disk_stays_a_similarity():
    st = PhysicalSettings(distortion=(0.0, 0.0), seed=12, shape=(256, 256))
    image, _ = render_physical(SI, ZONE, 200, 6, st, x_axis=X_AXIS)
    disk = find_disk(image)
    assert not disk.distortion_significant and disk.detector_distortion == (0.0, 0.0)


def test_cli_seeded_detection(tmp_path, capsys, distorted):
    import json

    from conftest import run_cli

    from laueline.images.io import write_image

    image, truth = distorted
    write_image(tmp_path / "p.tif", image)
    st = PhysicalSettings(distortion=DISTORTION)
    # the renderer's own detector as a calibration document (no distortion in it:
    # the command takes the disk's, which is significant here)
    cal = {"schema": "laueline.fit/1", "kv": 200.0,
           "detector": {"center_px": list(truth["center_px"]),
                        "scale_px_per_mrad": truth["scale_px_per_mrad"],
                        "rotation_deg": st.rotation_deg, "mirror": st.mirror}}
    (tmp_path / "cal.json").write_text(json.dumps(cal))
    code, out, err = run_cli(capsys, "detect", tmp_path / "p.tif", "--structure", "Si",
                             "--zone", 2, 3, 0, "--x-axis", 0, 0, 4, "--calibration",
                             tmp_path / "cal.json", "--json", tmp_path / "d.json")
    assert code == 0, err
    assert "elliptical distortion" in out
    doc = json.loads((tmp_path / "d.json").read_text())
    assert doc["disk"]["distortion_significant"]
    found = {tuple(ln["hkl"]) for ln in doc["lines"]}
    assert {(-7, 5, -5), (5, -3, 9), (4, -2, 14)} <= found
    assert all(len(ln["minima_px"]) >= 3 for ln in doc["lines"])
    # the seeded options go together
    code, out, err = run_cli(capsys, "detect", tmp_path / "p.tif", "--zone", 2, 3, 0)
    assert code == 2 and "--calibration" in err


# -- weak lines at a realistic dose ----------------------------------------------------

@pytest.fixture(scope="module", params=[2e4, 1e5])
def weak(request):
    # every line drawn at 2 to 3 % contrast; Poisson counting at 2e4 and 1e5
    # counts per pixel in the disk, the range of a CBED pattern recorded with
    # a few seconds' exposure on a CCD or direct-electron camera (common practice)
    st = PhysicalSettings(shape=(512, 512), distortion=DISTORTION, seed=21, dose=request.param,
                          contrast=(0.02, 0.03))
    image, truth = render_physical(SI, ZONE, 200, 6, st, x_axis=X_AXIS)
    return image, truth, st


def test_seeded_detection_of_weak_lines(weak):
    image, truth, st = weak
    detector = Detector(tuple(truth["center_px"]), truth["scale_px_per_mrad"], st.rotation_deg,
                        st.mirror, DISTORTION)
    det = detect_seeded(image, truth["pattern"], detector)
    errors, spurious = _match(det, truth, min_contrast=0.0)
    values = np.array(list(errors.values()))
    assert len(values) >= 15
    assert np.all(values < 0.5), errors          # every resolvable line found
    # the target: within 0.1 px rms of the true minima (the minimum of the
    # blurred two-beam profile, tests/physical_render.py)
    assert math.sqrt(np.mean(values ** 2)) < 0.1, errors
    assert spurious == 0


def test_blind_detection_of_weak_lines_reports_nothing_spurious(weak):
    image, truth, _ = weak
    det = detect_lines(image)
    errors, spurious = _match(det, truth, min_contrast=0.0)
    assert spurious == 0
    # what it does report lies on drawn lines
    assert len(det.good_lines) >= 10


# -- scale: large images, wide and narrow lines ------------------------------------------

def _straight_lines_image(size, sigma_px, seed):
    """A disk with straight Gaussian deficit lines, drawn here without laueline.

    Returns the image and the drawn lines as (rho, angle) about the centre.
    """
    rng = np.random.default_rng(seed)
    c = np.array([(size - 1) / 2 + 0.31, (size - 1) / 2 - 0.17])
    radius = 0.4 * size
    y, x = np.mgrid[0:size, 0:size].astype(float)
    r = np.hypot(x - c[0], y - c[1])
    disk = 0.5 * erfc((r - radius) / (math.sqrt(2) * 1.0))
    level = (1.0 + 0.1 * (1 - (r / radius) ** 2)) * disk
    lines = [(0.05 * radius, 0.3), (0.3 * radius, 1.4), (-0.45 * radius, 2.2),
             (0.6 * radius, -0.6), (-0.2 * radius, -1.9), (0.75 * radius, 2.9)]
    factor = np.ones_like(level)
    for rho, a in lines:
        d = (x - c[0]) * math.cos(a) + (y - c[1]) * math.sin(a) - rho
        factor *= 1 - 0.15 * np.exp(-0.5 * (d / sigma_px) ** 2)
    image = rng.poisson((0.04 + level * factor) * 5000.0).astype(float)
    return image, c, radius, lines


@pytest.mark.parametrize("sigma_px", [3.8, 0.9])
def test_blind_detection_at_scale(sigma_px):
    # a 1024 px pattern: the search runs on a block-averaged copy when the lines
    # are wide (9 px FWHM here, as at 2048 px) and falls back to full resolution
    # when they are narrow (2 px FWHM); every drawn line found, none spurious
    image, c, radius, drawn = _straight_lines_image(1024, sigma_px, seed=3)
    det = detect_lines(image)
    s = np.linspace(-1, 1, 41)
    rms = []
    for rho, a in drawn:
        span = math.sqrt(radius ** 2 - rho ** 2) - 15
        pts = c + np.outer(s * span, [-math.sin(a), math.cos(a)]) + rho * np.array(
            [math.cos(a), math.sin(a)])
        rms.append(min(math.sqrt(np.mean(_line_distance(ln, pts, det.disk) ** 2))
                       for ln in det.lines))
    # the target: 0.1 px rms over the lines.  Straight symmetric lines at 15 %
    # contrast and 5000 counts have a noise limit of about 0.01 px; what is left
    # comes from profiles cut where the other lines cross (up to 0.15 px on a
    # single line allowed)
    rms = np.array(rms)
    assert math.sqrt(np.mean(rms ** 2)) < 0.1 and np.all(rms < 0.15), rms
    assert len(det.good_lines) == len(drawn)


def test_pooled_offsets_with_equal_variances():
    from laueline.images.lineprofile import pool_offsets

    # with equal variances v the DerSimonian-Laird between-line variance is the
    # sample variance less v, and each estimate is pulled to the mean by the
    # factor v / (v + tau^2) (Borenstein, Hedges, Higgins and Rothstein,
    # Introduction to Meta-Analysis, 2009, ch. 12; from memory)
    rng = np.random.default_rng(1)
    x = rng.normal(0.0, 0.3, 12)
    v = 0.01
    out, var = pool_offsets(x, np.full(12, v), np.ones(12), np.ones(12, bool))
    tau2 = np.var(x, ddof=1) - v
    expect = x.mean() + (x - x.mean()) * tau2 / (tau2 + v)
    np.testing.assert_allclose(out, expect, rtol=1e-10)
    assert np.all(var < v)
    # lines that agree within their noise all take the common mean
    same = np.full(12, 0.2) + rng.normal(0, 1e-4, 12)
    out, _ = pool_offsets(same, np.full(12, v), np.ones(12), np.ones(12, bool))
    np.testing.assert_allclose(out, same.mean(), atol=1e-12)
