"""Dynamical pattern images: the Bloch-wave disk, its truth, and what laueline makes of it.

The fixtures in tests/data/dynamical/ were rendered by
tests/data/make_dynamical_patterns.py with a larger beam set than the line
minima and the corrected refinement use by default (see that script), so
the detection and the fits below meet lines that their own models did not
draw.
"""

import json
import math
from pathlib import Path

import numpy as np
import pytest
import tifffile
from scipy.ndimage import map_coordinates

from laueline import predict, read_crystal
from laueline.cli import main
from laueline.detector import Detector
from laueline.dynamical import dynamical_lines
from laueline.dynamical.minima import disk_intensity
from laueline.images.detect import detect_seeded

DATA = Path(__file__).resolve().parent / "data" / "dynamical"
SI = read_crystal("Si")


# ---------------------------------------------------------------------------
# the disk intensity against the line minima
# ---------------------------------------------------------------------------

@pytest.fixture(scope="module")
def si230():
    return predict(SI, (2, 3, 0), 200.0, 6.0, min_strength=0.1)


def test_disk_image_minima_agree_with_the_line_minima(si230):
    """The image's lines have their minima where dynamical_lines puts them.

    Two routes through the engine that share only the Bloch-wave solver:
    dynamical_lines scans each line along its normal with its own beam set
    (zero layer to 2.0 1/A, HOLZ beams below 0.005 1/A around the scan) and
    sharpens the minimum by successive scans and a parabola; here the image
    route (zero layer to 1.5 1/A, HOLZ beams below 0.002 1/A in each
    0.5 mrad cell) is sampled every 2.5e-3 mrad across the line, divided by
    the same route without the line's reflection, and the minimum taken from
    a parabola through the lowest three samples.
    """
    holz = np.flatnonzero(si230.laue_zone >= 1)
    lines = holz[np.argsort(-si230.strength[holz], kind="stable")[:1]]
    truth = dynamical_lines(si230, 200.0, lines=lines, check_convergence=False)
    u = np.linspace(-0.02, 0.02, 17)
    errors = []
    for i in lines:
        ok = np.isfinite(truth.shift_mrad[i])
        base, normal = truth.locus_mrad[i][ok], truth.normal_points[i][ok]
        shift = truth.shift_mrad[i][ok]
        uu = shift[:, None] + u[None, :]
        points = base[:, None, :] + uu[..., None] * normal[:, None, :]
        with_line, _ = disk_intensity(si230, points, 200.0)
        without, _ = disk_intensity(si230, points, 200.0, exclude=[si230.hkl[i]])
        ratio = with_line / without
        rows = np.arange(len(ratio))
        k = np.clip(np.argmin(ratio, axis=1), 1, len(u) - 2)
        y0, y1, y2 = ratio[rows, k - 1], ratio[rows, k], ratio[rows, k + 1]
        found = uu[rows, k] + 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2) * (u[1] - u[0])
        errors.append(found - shift)
    errors = np.concatenate(errors)
    assert len(errors) >= 4
    # 2e-3 mrad: the accuracy asked of the image route (a twentieth of the
    # typical dynamical shift, 0.04 px at 18 px/mrad); the parabola on
    # 2.5e-3 mrad samples of a line 0.1-0.3 mrad wide is good to ~1e-4 mrad
    assert np.max(np.abs(errors)) < 2e-3, errors


def test_disk_intensity_depends_on_the_point_alone(si230):
    """A point's intensity is the same whatever other points are asked, in one
    process or several."""
    axis = np.linspace(-1.2, 1.2, 13)
    points = np.stack(np.meshgrid(axis, axis), axis=-1)
    whole, n_beams = disk_intensity(si230, points, 200.0, cell_mrad=1.0)
    part, _ = disk_intensity(si230, points[::3, 1::4], 200.0, cell_mrad=1.0)
    spread, n_spread = disk_intensity(si230, points, 200.0, cell_mrad=1.0, workers=2)
    # identical arithmetic on identical stacks: equal to rounding
    assert np.allclose(part, whole[::3, 1::4], rtol=1e-12, atol=0)
    assert np.allclose(spread, whole, rtol=1e-12, atol=0) and n_spread == n_beams
    # an absorbing foil passes less than the incident intensity (a = 0.1)
    assert np.all((whole > 0) & (whole < 1))


def test_line_minima_shared_among_processes_match_one_process():
    """The render's truth computed with its lines spread over two processes
    equals the single-process dynamical_lines (same arithmetic per line)."""
    from laueline.images.render import _lines_in_processes

    pattern = predict(SI, (2, 3, 0), 200.0, 2.0, min_strength=0.5, gmax=2.5)
    options = dict(absorption_ratio=0.1, check_convergence=False)
    one = dynamical_lines(pattern, 150.0, **options)
    two = _lines_in_processes(pattern, 150.0, 2, options)
    assert pattern.n_lines >= 2
    for name in ("minima_mrad", "shift_mrad", "contrast_points", "width_points_mrad"):
        for a, b in zip(getattr(one, name), getattr(two, name)):
            assert np.array_equal(a, b, equal_nan=True), name
    assert np.array_equal(one.contrast, two.contrast, equal_nan=True)
    assert one.n_beams == two.n_beams


# ---------------------------------------------------------------------------
# laueline render --dynamical
# ---------------------------------------------------------------------------

TINY = ["render", "Si", "--zone", "2", "3", "0", "--kv", "200", "--disk-mrad", "2",
        "--gmax", "2.5", "--size", "64", "64", "--min-strength", "0.2", "--dose", "0",
        "--blur-px", "0", "--background-tilt", "0"]


def test_render_dynamical_writes_image_and_truth_with_minima(tmp_path, capsys):
    out = tmp_path / "tiny.tif"
    assert main(TINY + ["--dynamical", "--thickness-nm", "150", "--out", str(out)]) == 0
    truth = json.loads((tmp_path / "tiny.truth.json").read_text())
    image = tifffile.imread(out).astype(float)
    assert image.shape == (64, 64)
    assert truth["dynamical"]["thickness_nm"] == 150.0
    assert truth["dynamical"]["n_beams"] > truth["dynamical"]["n_zero_layer_beams"]
    centre = np.asarray(truth["detector"]["center_px"])
    step = 0.3 * truth["detector"]["scale_px_per_mrad"]
    depth, contrast = [], []
    for line in truth["lines"]:
        dyn = line["dynamical"]
        minima = np.array(dyn["minima_px"])
        assert len(minima) >= 3 and len(dyn["minima_mrad"]) == len(minima)
        # the published shifts are hundredths of a mrad (Humphreys, Rep. Prog.
        # Phys. 42 (1979) 1825): 0.1 mrad would mean a misplaced minimum
        assert np.all(np.abs(dyn["shift_mrad"]) < 0.1)
        along = np.gradient(minima, axis=0)
        normal = np.stack([-along[:, 1], along[:, 0]], axis=1)
        normal /= np.linalg.norm(normal, axis=1, keepdims=True)
        sides = [minima + step * normal, minima - step * normal]
        inside = np.all([np.hypot(*(q - centre).T) < 0.85 * truth["disk_radius_px"]
                         for q in sides], axis=0)

        def sample(q):
            return map_coordinates(image, [q[inside, 1], q[inside, 0]], order=1)

        depth.extend(1.0 - sample(minima) / (0.5 * (sample(sides[0]) + sample(sides[1]))))
        contrast.extend([dyn["contrast"]] * int(inside.sum()))
    # the noiseless image is darker on the recorded minima than 0.3 mrad to
    # either side (the lines are about 0.3 mrad wide at half depth), by a good
    # part of the recorded contrast: image and truth share one detector
    # mapping (a wrong mapping would leave the ratio near 1).  A third, not
    # all, of the contrast: crossings and the zero-layer slope share the sides
    assert len(depth) >= 6
    assert np.median(depth) > np.median(contrast) / 3, (depth, contrast)


@pytest.mark.parametrize("extra, message", [
    (["--dynamical"], "thickness"),
    (["--dynamical", "--thickness-nm", "0"], "thickness"),
    (["--dynamical", "--thickness-nm", "-20"], "thickness"),
    (["--dynamical", "--thickness-nm", "2500"], "thickness"),
    (["--dynamical", "--thickness-nm", "100", "--absorption-ratio", "1"], "absorption"),
    (["--dynamical", "--thickness-nm", "100", "--absorption-ratio", "-0.1"], "absorption"),
    (["--thickness-nm", "100"], "--dynamical"),
])
def test_render_dynamical_bad_input_writes_nothing(tmp_path, capsys, extra, message):
    out = tmp_path / "bad.tif"
    assert main(TINY + extra + ["--out", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and message in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []


# ---------------------------------------------------------------------------
# the fixtures: seeded detection
# ---------------------------------------------------------------------------

def _fixture(name):
    truth = json.loads((DATA / f"{name}.truth.json").read_text())
    return tifffile.imread(DATA / truth["image"]).astype(float), truth


def _line_distance(line, points, centre):
    """Distances (px) of points from a detected (curved) line (DetectedLine's model)."""
    a = math.radians(line.normal_angle_deg)
    n, m = np.array([math.cos(a), math.sin(a)]), np.array([-math.sin(a), math.cos(a)])
    u = np.asarray(points) - np.asarray(centre)
    s = u @ m
    return u @ n - line.offset_px - line.curvature_per_px * s * s


def _resolvable(truth, margin_px=8.0):
    """Minima (px) of the lines the truth marks resolvable, inside the disk less a margin."""
    centre = np.asarray(truth["detector"]["center_px"])
    radius = truth["disk_radius_px"] - margin_px
    out = {}
    for line in truth["lines"]:
        if line["dynamical"]["resolvable"]:
            pts = np.array(line["dynamical"]["minima_px"]).reshape(-1, 2)
            out[tuple(line["hkl"])] = pts[np.hypot(*(pts - centre).T) < radius]
    return out


FIXTURES = ["si-230-reference", "si-230-strained", "si-340-reference", "si-340-strained"]


@pytest.fixture(scope="module", params=FIXTURES)
def seeded(request):
    """Seeded detection on a fixture: (detection, lines found by hkl, truth)."""
    image, truth = _fixture(request.param)
    det_truth = truth["detector"]
    detector = Detector(tuple(det_truth["center_px"]), det_truth["scale_px_per_mrad"],
                        det_truth["rotation_deg"], det_truth["mirror"])
    # the pattern predicted for the unstrained reference seeds both images
    pattern = predict(SI, truth["zone"], truth["kv"], truth["disk_mrad"],
                      x_axis=truth["x_axis"], min_strength=0.05)
    det = detect_seeded(image, pattern, detector)
    return det, {ln.hkl: ln for ln in det.lines if not ln.flag}, truth


def test_seeded_detection_finds_the_resolvable_dynamical_lines(seeded):
    det, found, truth = seeded
    resolvable = _resolvable(truth)
    assert len(resolvable) >= 6
    missing = sorted(set(resolvable) - set(found))
    assert not missing, f"resolvable lines not found: {missing}"
    # each of them traces its own truth line (median distance within 1.5 px,
    # the rule of tests/test_detect_physical.py)
    off = {h: float(np.median(np.abs(_line_distance(found[h], pts, det.disk.center_px))))
           for h, pts in resolvable.items()}
    assert max(off.values()) < 1.5, off


#: Known shortfalls of the seeded detection on these patterns (measured; the
#: detection, not the patterns, is at fault: see each reason).
WEAK_LINES_OFF = (
    "the weak lines -2 2 16 and -2 2 -16 (3-4 % deep, below the resolvable mark) are "
    "reported 2.5 and 3.0 px (median) from their minima, each measured on three or four "
    "segments with sigmas of 0.3-0.7 px; on the reference pattern -2 2 -16 is 1.2 px off, "
    "within the 1.5 px rule")
KNOWN_SPURIOUS = {"si-230-strained": WEAK_LINES_OFF}


def test_seeded_detection_reports_no_spurious_line(seeded, request):
    det, found, truth = seeded
    reason = KNOWN_SPURIOUS.get(Path(truth["image"]).stem)
    if reason:
        request.applymarker(pytest.mark.xfail(strict=True, reason=reason))
    # a line found is spurious when it traces no truth line at all: its median
    # distance from the minima of every truth line exceeds 1.5 px (the rule of
    # tests/test_detect_physical.py)
    minima = [np.array(ln["dynamical"]["minima_px"]).reshape(-1, 2) for ln in truth["lines"]]
    spurious = [h for h, ln in found.items()
                if min(np.median(np.abs(_line_distance(ln, m, det.disk.center_px)))
                       for m in minima if len(m)) > 1.5]
    assert not spurious, spurious


@pytest.mark.xfail(strict=True, reason=(
    "seeded detection places the resolvable dynamical lines 0.14 and 0.15 px rms (Si "
    "[2 3 0] reference and strained; the 5 % deep 4 -2 14 and 4 -2 -14 0.26 px) and 0.41 "
    "and 0.38 px rms (Si [3 4 0]) from the minima of the Bloch-wave intensity; a noiseless "
    "render of the [2 3 0] reference gives 0.12 px, 0.09 px with the 0.9 px point-spread "
    "function.  On [3 4 0] the strong 7 -5 -1 (47 % deep) and -10 8 -2 are 0.9-1.0 px rms "
    "off: between the crossings, where the truth has no minima, the image's own minima "
    "wander by 1-3 px from the line through the truth's, and the conic through all "
    "segments follows them"))
def test_seeded_detection_positions_within_a_tenth_of_a_pixel(seeded):
    det, found, truth = seeded
    errors = {h: math.sqrt(np.mean(_line_distance(found[h], pts, det.disk.center_px) ** 2))
              for h, pts in _resolvable(truth).items() if h in found}
    rms = math.sqrt(np.mean(np.square(list(errors.values()))))
    # issue 11's criterion: positions within 0.1 px rms of the dynamical minima
    assert rms < 0.1, (rms, errors)
