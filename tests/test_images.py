"""Images: reading, rendering, detection and image-driven refinement."""

import json
import math
from pathlib import Path

import numpy as np
import pytest
from conftest import run_cli

from laueline import read_crystal
from laueline.errors import InputError
from laueline.images.detect import detect_lines, find_disk
from laueline.images.io import read_image, write_image
from laueline.images.render import RenderSettings, render_pattern
from laueline.refine import refine_image

SI = read_crystal("Si")
ZONE = (2, 3, 0)
X_AXIS = (0, 0, 4)
E_TRUE = np.array([1e-3, -5e-4, 2e-3, 2e-4, -3e-4, 1e-4])


# -- reading ------------------------------------------------------------------

@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.int32, np.float32, np.float64])
def test_tiff_types_round_trip(tmp_path, dtype):
    import tifffile

    data = (np.arange(64 * 48).reshape(48, 64) % 200).astype(dtype)
    tifffile.imwrite(tmp_path / "a.tif", data)
    image, saturation = read_image(tmp_path / "a.tif")
    np.testing.assert_array_equal(image, data.astype(float))
    assert image.shape == (48, 64)  # rows, columns
    assert (saturation is None) == np.issubdtype(dtype, np.floating)


def test_png_and_npy(tmp_path):
    import imageio.v3 as iio

    data = (np.arange(40 * 30).reshape(30, 40) % 250).astype(np.uint8)
    iio.imwrite(tmp_path / "a.png", data)
    np.save(tmp_path / "a.npy", data.astype(float))
    np.testing.assert_array_equal(read_image(tmp_path / "a.png")[0], data)
    np.testing.assert_array_equal(read_image(tmp_path / "a.npy")[0], data)


@pytest.mark.parametrize("shape", [(3, 32, 32), (2, 2, 32, 32)])
def test_wrong_dimensionality_names_shape(tmp_path, shape):
    np.save(tmp_path / "s.npy", np.zeros(shape))
    with pytest.raises(InputError, match=r"\(" + ", ".join(map(str, shape)) + r"\)"):
        read_image(tmp_path / "s.npy")


def test_unreadable_and_empty(tmp_path):
    (tmp_path / "bad.tif").write_bytes(b"not a tiff at all")
    (tmp_path / "empty.png").write_bytes(b"")
    for name in ("bad.tif", "empty.png", "missing.tif"):
        with pytest.raises(InputError):
            read_image(tmp_path / name)


# -- rendering ------------------------------------------------------------------

def test_same_seed_same_image_and_truth():
    settings = RenderSettings(rotation_deg=17, seed=3, shape=(256, 256))
    a, ta = render_pattern(SI, ZONE, 200, 6, settings, x_axis=X_AXIS)
    b, tb = render_pattern(SI, ZONE, 200, 6, settings, x_axis=X_AXIS)
    c, _ = render_pattern(SI, ZONE, 200, 6, RenderSettings(rotation_deg=17, seed=4,
                                                           shape=(256, 256)), x_axis=X_AXIS)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)
    assert ta == tb and ta["schema"] == "laueline.truth/1"
    assert ta["settings"]["seed"] == 3 and ta["detector"]["rotation_deg"] == 17
    assert len(ta["crossings"]) > 10 and "xy_px" in ta["crossings"][0]


def test_examples_match_the_scenario():
    # examples/ holds the demo's patterns as rendered by examples/make_demo.py.
    # The geometry must agree exactly; the Poisson draws may differ in a few
    # pixels between NumPy versions (their streams are not guaranteed stable).
    from laueline.demo import SCENARIO, scenario_strain

    folder = Path(__file__).resolve().parents[1] / "examples"
    stored, _ = read_image(folder / "channel.tif")
    stored_truth = json.loads((folder / "channel.truth.json").read_text())
    settings = RenderSettings(rotation_deg=SCENARIO["rotation_deg"],
                              seed=SCENARIO["seeds"]["channel"])
    image, truth = render_pattern(SI, SCENARIO["zone"], SCENARIO["effective_kv"],
                                  SCENARIO["disk_mrad"], settings, strain=scenario_strain(SI),
                                  x_axis=SCENARIO["x_axis"])
    np.testing.assert_allclose([c["xy_px"] for c in stored_truth["crossings"]],
                               [c["xy_px"] for c in truth["crossings"]], atol=1e-9)
    assert np.mean(stored != image) < 0.01


# -- detection against the truth ----------------------------------------------------

def _truth_lines(truth, disk, min_chord_px=100, resolve_px=5.0):
    """Drawn lines the detection can be asked to find.

    Left out: chords shorter than ``min_chord_px`` (lines grazing the rim), and
    lines running within ``resolve_px`` (about two line widths) of a stronger
    line over half their chord, which no profile fit separates.
    """
    cx, cy = disk.center_px
    lines = [(tl, np.array(tl["points_px"])) for tl in truth["lines"]]
    out = []
    for tl, pts in lines:
        d = pts[-1] - pts[0]
        n = np.array([d[1], -d[0]]) / np.hypot(*d)
        rho = float(n @ (pts[len(pts) // 2] - [cx, cy]))
        chord = 2 * math.sqrt(max(disk.radius_px ** 2 - rho ** 2, 0))
        if chord < min_chord_px:
            continue
        hidden = False
        for other, opts in lines:
            if other["strength"] <= tl["strength"] or other is tl:
                continue
            od = opts[-1] - opts[0]
            on = np.array([od[1], -od[0]]) / np.hypot(*od)
            if np.median(np.abs((pts - opts[len(opts) // 2]) @ on)) < resolve_px:
                hidden = True
        if not hidden:
            out.append((tl, pts))
    return out


def _distance(ln, pts, disk):
    cx, cy = disk.center_px
    a = math.radians(ln.normal_angle_deg)
    u, v = pts[:, 0] - cx, pts[:, 1] - cy
    s = -math.sin(a) * u + math.cos(a) * v
    return math.cos(a) * u + math.sin(a) * v - ln.offset_px - ln.curvature_per_px * s * s


def _match_truth(det, truth):
    """rms distance of every sought truth line from its detected line; unmatched count."""
    errors, used = [], set()
    inner = det.disk.radius_px - 8
    for tl, pts in _truth_lines(truth, det.disk):
        keep = np.hypot(pts[:, 0] - det.disk.center_px[0], pts[:, 1] - det.disk.center_px[1])
        pts = pts[keep < inner]
        best = min(range(len(det.lines)),
                   key=lambda k: np.sqrt(np.mean(_distance(det.lines[k], pts, det.disk) ** 2)))
        errors.append(np.sqrt(np.mean(_distance(det.lines[best], pts, det.disk) ** 2)))
        used.add(best)
    return np.array(errors), len(det.good_lines) - len(used)


@pytest.mark.parametrize("name, zone, x_axis", [("Si", ZONE, X_AXIS),
                                                ("Mg", (1, 2, 3), None)])
def test_detection_finds_every_line_to_a_tenth_of_a_pixel(name, zone, x_axis):
    crystal = read_crystal(name)
    settings = RenderSettings(rotation_deg=17, seed=5, min_strength=0.15, dose=2000)
    image, truth = render_pattern(crystal, zone, 200, 6, settings, x_axis=x_axis)
    det = detect_lines(image)
    errors, spurious = _match_truth(det, truth)
    sought = len(_truth_lines(truth, det.disk))
    assert sought >= 8
    # the target: every line found, none spurious, positions within 0.1 px rms
    assert np.all(errors < 0.5), errors
    assert np.sqrt(np.mean(errors ** 2)) < 0.1
    assert spurious == 0
    # the disk: centre within a quarter pixel, radius within a fifth
    assert np.hypot(*(np.array(det.disk.center_px) - truth["detector"]["center_px"])) < 0.3
    assert abs(det.disk.radius_px - truth["disk_radius_px"]) < 0.3


def _calibrated(seed_ref=1):
    ref, _ = render_pattern(SI, ZONE, 197.3, 6, RenderSettings(rotation_deg=17, seed=seed_ref),
                            x_axis=X_AXIS)
    cal = refine_image(SI, ZONE, detect_lines(ref), kv=200, model="fixed", free=["kv"],
                       x_axis=X_AXIS, disk_mrad=6, mirror=False)
    return cal


def test_image_calibration_and_strain():
    cal = _calibrated()
    # voltage recovered from the image: 197.3 kV rendered, 200 kV nominal start
    assert abs(cal.kv - 197.3) < 3 * cal.kv_sigma + 0.005
    assert cal.detector.scale_px_per_mrad == pytest.approx(0.42 * 512 / 6, rel=1e-4)
    image, _ = render_pattern(SI, ZONE, 197.3, 6, RenderSettings(rotation_deg=17, seed=2),
                              x_axis=X_AXIS, strain=E_TRUE)
    fit = refine_image(SI, ZONE, detect_lines(image), calibration=(cal.kv, cal.detector),
                       x_axis=X_AXIS)
    # the target: strain within twice its reported uncertainty
    assert np.all(np.abs(fit.values[:6] - E_TRUE) < 2 * fit.sigmas[:6] + 1e-6)
    assert fit.lines is not None and fit.n_used >= 25


@pytest.mark.slow
def test_image_uncertainties_match_scatter():
    # over repeated noise seeds the normalised errors (fit - truth) / sigma have
    # mean square near 1; 8 seeds x 6 components = 48 values, whose mean
    # square scatters by about 20 %, and the calibration adds a common error
    cal = _calibrated()
    z = []
    for seed in range(20, 28):
        image, _ = render_pattern(SI, ZONE, 197.3, 6, RenderSettings(rotation_deg=17, seed=seed),
                                  x_axis=X_AXIS, strain=E_TRUE)
        fit = refine_image(SI, ZONE, detect_lines(image), calibration=(cal.kv, cal.detector),
                           x_axis=X_AXIS)
        z.extend((fit.values[:6] - E_TRUE) / fit.sigmas[:6])
    mean_square = float(np.mean(np.square(z)))
    assert 0.4 < mean_square < 2.5, mean_square


# -- robustness --------------------------------------------------------------------------

def _render(**kw):
    kw.setdefault("min_strength", 0.15)
    settings = RenderSettings(rotation_deg=17, seed=7, **kw)
    return render_pattern(SI, ZONE, 200, 6, settings, x_axis=X_AXIS)


def test_disk_partly_outside_the_frame():
    image, truth = _render(center_px=(300.0, 180.0))
    det = detect_lines(image)
    assert any("outside the frame" in w for w in det.warnings)
    assert np.hypot(*(np.array(det.disk.center_px) - [300, 180])) < 0.5
    fit = refine_image(SI, ZONE, det, model="fixed", x_axis=X_AXIS, disk_mrad=6, mirror=False)
    assert fit.detector.center_px == pytest.approx((300, 180), abs=0.1)


def test_saturated_pixels():
    # the brightest 1 % of the frame clipped, as by a saturating camera: those
    # pixels are left out, lines crossing them are fitted on the rest
    image, truth = _render(dose=3000)
    image = np.minimum(image, np.percentile(image, 99))
    det = detect_lines(image)
    assert det.saturated_px > 0 and any("saturated" in w for w in det.warnings)
    errors, spurious = _match_truth(det, truth)
    assert np.mean(errors < 0.2) > 0.8 and spurious == 0


def test_missing_line():
    image, truth = _render(omit=[(5, -3, -9)])
    det = detect_lines(image)
    fit = refine_image(SI, ZONE, det, model="fixed", x_axis=X_AXIS, disk_mrad=6, mirror=False)
    assert all(ln["hkl"] != [5, -3, -9] for ln in fit.lines if ln["used"])
    assert fit.rms_px < 0.2


def test_straight_artefact_is_flagged():
    image, truth = _render()
    rows, cols = image.shape
    y, x = np.mgrid[0:rows, 0:cols]
    d = (x - 40) * math.cos(0.3) + (y - 0) * math.sin(0.3) - 150.0
    image = image * (1 - 0.35 * np.exp(-0.5 * (d / 1.2) ** 2))  # a scratch across the frame
    det = detect_lines(image)
    flagged = [ln for ln in det.lines if ln.flag]
    assert len(flagged) == 1 and "outside the disk" in flagged[0].flag
    assert any("artefact" in w for w in det.warnings)
    fit = refine_image(SI, ZONE, det, model="fixed", x_axis=X_AXIS, disk_mrad=6, mirror=False)
    assert fit.rms_px < 0.2


def test_strong_background_gradient():
    image, truth = _render(background_tilt=1.2)
    det = detect_lines(image)
    errors, spurious = _match_truth(det, truth)
    assert np.sqrt(np.mean(errors ** 2)) < 0.15 and spurious == 0


# -- against scikit-image's own estimators on simple geometric images ----------------------

def test_disk_against_scikit_image_circle_estimator():
    from skimage.draw import disk as draw_disk
    from skimage.feature import canny
    from skimage.measure import CircleModel

    image = np.full((300, 320), 10.0)
    rr, cc = draw_disk((140.3, 171.7), 101.2, shape=image.shape)
    image[rr, cc] = 100.0
    ours = find_disk(image)
    edges = np.argwhere(canny(image, sigma=2.0))[:, ::-1].astype(float)
    if hasattr(CircleModel, "from_estimate"):
        model = CircleModel.from_estimate(edges)
        xc, yc, r = *model.center, model.radius
    else:
        model = CircleModel()
        model.estimate(edges)
        xc, yc, r = model.params
    # both estimate the same drawn circle (pixelated edges: about half a pixel)
    assert np.hypot(ours.center_px[0] - xc, ours.center_px[1] - yc) < 0.5
    assert abs(ours.radius_px - r) < 1.0


def test_lines_against_scikit_image_hough():
    from skimage.transform import hough_line, hough_line_peaks

    rows = cols = 400
    y, x = np.mgrid[0:rows, 0:cols].astype(float)
    r = np.hypot(x - 199.5, y - 199.5)
    image = np.where(r < 180, 100.0, 5.0)
    lines = [(math.radians(20), 30.0), (math.radians(75), -60.0), (math.radians(130), 90.0)]
    binary = np.zeros_like(image, dtype=bool)
    for a, rho in lines:
        d = (x - 199.5) * math.cos(a) + (y - 199.5) * math.sin(a) - rho
        # deficit lines live inside the disk only
        image *= np.where(r < 180, 1 - 0.5 * np.exp(-0.5 * (d / 1.2) ** 2), 1.0)
        binary |= (np.abs(d) < 1.0) & (r < 175)
    det = detect_lines(image)
    h, theta, dist = hough_line(binary, theta=np.linspace(-np.pi / 2, np.pi / 2, 720,
                                                           endpoint=False))
    _, angles, dists = hough_line_peaks(h, theta, dist, num_peaks=3)
    assert len(det.good_lines) == 3
    for a, d in zip(angles, dists):
        # scikit-image's lines are x cos a + y sin a = d about the image origin
        rho = d - (det.disk.center_px[0] * math.cos(a) + det.disk.center_px[1] * math.sin(a))
        match = [ln for ln in det.lines
                 if abs(math.sin(math.radians(ln.normal_angle_deg) - a)) < math.radians(0.5)
                 and abs(abs(ln.offset_px) - abs(rho)) < 1.0]
        assert len(match) == 1  # agreement within the Hough bins (0.25 deg, 1 px)


# -- command line ------------------------------------------------------------------------

def test_cli_render_detect_refine(tmp_path, capsys):
    pattern = tmp_path / "p.tif"
    code, out, err = run_cli(capsys, "render", "Si", "--zone", 2, 3, 0, "--x-axis", 0, 0, 4,
                         "--rotation-deg", 17, "--out", pattern, "--seed", 1)
    assert code == 0, err
    truth = json.loads((tmp_path / "p.truth.json").read_text())
    assert truth["schema"] == "laueline.truth/1"
    code, out, err = run_cli(capsys, "detect", pattern, "--json", tmp_path / "d.json",
                         "--figure", tmp_path / "d.png")
    assert code == 0, err
    doc = json.loads((tmp_path / "d.json").read_text())
    assert doc["schema"] == "laueline.detection/1" and len(doc["lines"]) > 10
    for key in ["normal_angle_deg", "offset_px", "curvature_per_px", "position_sigma_px",
                "depth", "width_px", "snr"]:
        assert key in doc["lines"][0]
    assert "sigma_px" in doc["crossings"][0]
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", 2, 3, 0, "--x-axis", 0, 0, 4,
                         "--image", pattern, "--model", "fixed", "--free", "kv",
                         "--disk-mrad", 6, "--no-mirror", "--json", tmp_path / "f.json",
                         "--figure", tmp_path / "f.png")
    assert code == 0, err
    fit = json.loads((tmp_path / "f.json").read_text())
    assert fit["schema"] == "laueline.fit/2" and fit["observations"] == "lines"
    assert fit["kv"] == pytest.approx(200, abs=0.01)


def test_cli_bad_images(tmp_path, capsys):
    (tmp_path / "bad.tif").write_bytes(b"rubbish")
    np.save(tmp_path / "cube.npy", np.zeros((4, 64, 64)))
    np.save(tmp_path / "flat.npy", np.random.default_rng(0).normal(100, 1, (128, 128)))
    blank, _ = render_pattern(SI, ZONE, 200, 6, RenderSettings(min_strength=2.0, seed=1,
                                                               shape=(128, 128)),
                              x_axis=X_AXIS)
    write_image(tmp_path / "blank.tif", blank)
    for name, message in [("bad.tif", "not a readable image"), ("cube.npy", "(4, 64, 64)"),
                          ("flat.npy", "disk"), ("blank.tif", "lines"),
                          ("missing.tif", "no such file")]:
        code, out, err = run_cli(capsys, "detect", tmp_path / name)
        assert code == 2, (name, err)
        assert len(err.strip().splitlines()) == 1 and message in err, (name, err)


@pytest.mark.slow
def test_demo_runs_and_recovers_the_truth(tmp_path):
    import io

    from laueline.demo import SCENARIO, run_demo

    stream = io.StringIO()
    cal, fit = run_demo(tmp_path / "demo", stream=stream)
    assert abs(cal.kv - SCENARIO["effective_kv"]) < 4 * cal.kv_sigma + 0.005
    fitted = fit.strain.sample_green_lagrange
    sigma = fit.strain.sample_green_lagrange_sigma
    truth = np.diag(SCENARIO["strain_sample"][:3])
    assert np.all(np.abs(fitted - truth) < 3 * sigma + 1e-5)
    text = stream.getvalue()
    assert "caution" in text and "truth" in text
    for name in ("calibration.json", "channel-fit.json", "channel-fit.png"):
        assert (tmp_path / "demo" / name).exists()
