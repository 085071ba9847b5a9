"""Elliptical projector distortion: measured on a reference, held for the strained pattern.

The patterns come from tests/physical_render.py, which applies the distortion
with its own pixel mapping (pixel = c + (I + E) s R M t written out there, not
laueline's Detector), draws the disk outline as an ellipse in pixels and
two-beam rocking-curve line profiles with noise.  The distortion it applied
is the truth the measurements are checked against.
"""

import json
import math

import numpy as np
import pytest
from conftest import run_cli
from physical_render import PhysicalSettings, pixel_matrix, render_physical
from scipy import stats

from laueline import read_crystal
from laueline.detector import Detector
from laueline.fit import Calibration
from laueline.fit.calibration import DistortionMeasurement, combine_distortion
from laueline.images.detect import detect_lines
from laueline.refine import refine_image
from laueline.report import fit_document

SI = read_crystal("Si")
ZONE, X_AXIS = (2, 3, 0), (0, 0, 4)
DISTORTION = (0.003, -0.002)   # a few tenths of a percent, as projector lenses give
ROTATION_DEG = 23.0            # the renderer's default camera rotation
STRAIN = np.diag([2e-3, -1e-3, 0.0])
SHAPE = (400, 400)


def test_detector_mapping_against_the_renderers_own():
    # the renderer writes (I + E) s R M out from the definition, apart from Detector
    det = Detector((200.0, 190.0), 21.0, ROTATION_DEG, True, DISTORTION)
    t = np.array([[1.0, 0.0], [0.0, 1.0], [-3.5, 2.0], [4.0, 4.0]])
    expected = t @ pixel_matrix(21.0, ROTATION_DEG, True, DISTORTION).T + [200.0, 190.0]
    np.testing.assert_allclose(det.to_pixels(t), expected, rtol=0, atol=1e-9)  # rounding
    np.testing.assert_allclose(det.to_mrad(det.to_pixels(t)), t, rtol=0, atol=1e-12)
    # a circle of r mrad becomes an ellipse with semi-axes s r (1 +- |e|): the singular
    # values of I + E are 1 +- sqrt(e1^2 + e2^2) for a trace-free symmetric E
    singular = np.linalg.svd(det.matrix, compute_uv=False) / 21.0
    e = math.hypot(*DISTORTION)
    np.testing.assert_allclose(singular, [1 + e, 1 - e], rtol=1e-12)


def test_combination_and_significance_against_textbook_formulas():
    a = DistortionMeasurement("disk outline", (0.0030, -0.0021), np.diag([2e-4, 3e-4]) ** 2)
    b = DistortionMeasurement("line fit", (0.0026, -0.0016),
                              np.array([[9e-8, 2e-8], [2e-8, 1e-7]]))
    est = combine_distortion([a, b])
    # inverse-covariance weighted mean and its covariance (the generalised weighted
    # mean, e.g. Taylor, An Introduction to Error Analysis, 1997, ch. 7)
    wa, wb = np.linalg.inv(a.covariance), np.linalg.inv(b.covariance)
    cov = np.linalg.inv(wa + wb)
    mean = cov @ (wa @ a.value + wb @ b.value)
    np.testing.assert_allclose(est.value, mean, rtol=1e-12)
    np.testing.assert_allclose(est.covariance, cov, rtol=1e-12)
    # the 99 % test: q = e^T C^-1 e against the chi-square quantile with 2 dof (scipy.stats)
    q = float(mean @ np.linalg.solve(cov, mean))
    assert est.chi2 == pytest.approx(q, rel=1e-12)
    assert est.significant == (q > stats.chi2.ppf(0.99, 2))
    # agreement of the two about their mean: chi-square with 2 dof, tail from scipy.stats
    d = [np.asarray(m.value) - mean for m in (a, b)]
    agreement = d[0] @ wa @ d[0] + d[1] @ wb @ d[1]
    assert est.agreement_chi2 == pytest.approx(agreement, rel=1e-12)
    assert est.consistent == (stats.chi2.sf(agreement, 2) > 1e-3)
    # measurements that disagree by far more than their sigmas are flagged
    c = DistortionMeasurement("line fit", (-0.003, 0.002), b.covariance)
    assert not combine_distortion([a, c]).consistent
    # nothing beyond the noise: a plain similarity is held
    small = DistortionMeasurement("disk outline", (2e-4, -1e-4), np.diag([2e-4, 2e-4]) ** 2)
    weak = combine_distortion([small])
    assert not weak.significant and weak.used == (0.0, 0.0)
    assert weak.significant == (weak.chi2 > stats.chi2.ppf(0.99, 2))


@pytest.fixture(scope="module")
def distorted_pair():
    """A reference and a strained pattern through the same distorting projector."""
    st = PhysicalSettings(shape=SHAPE, distortion=DISTORTION, seed=21)
    reference, _ = render_physical(SI, ZONE, 200, 6, st, x_axis=X_AXIS)
    st = PhysicalSettings(shape=SHAPE, distortion=DISTORTION, seed=22)
    strained, _ = render_physical(SI, ZONE, 200, 6, st, x_axis=X_AXIS, strain=STRAIN)
    return reference, strained


def _within(value, truth, sigma, n_sigma=3.0):
    """|value - truth| <= n_sigma sigma componentwise (3 sigma: a 0.3 % false alarm
    per component for Gaussian errors, common practice)."""
    return np.all(np.abs(np.asarray(value) - truth) <= n_sigma * np.asarray(sigma))


def test_distortion_measured_held_and_strain_unbiased(distorted_pair):
    reference, strained = distorted_pair
    det = detect_lines(reference)
    disk = DistortionMeasurement.from_disk(det.disk)
    assert det.disk.distortion_significant
    assert _within(disk.value, DISTORTION, disk.sigma)
    # calibration: voltage and distortion freed, starting from the disk outline's
    ref = refine_image(SI, ZONE, det, x_axis=X_AXIS, kv=200, model="fixed",
                       free=("kv", "distortion"), disk_mrad=6.0, rotation_deg=ROTATION_DEG,
                       mirror=False, distortion=det.disk.detector_distortion)
    assert ref.success, ref.message
    line_fit = DistortionMeasurement.from_fit(ref)
    assert _within(line_fit.value, DISTORTION, line_fit.sigma)
    est = combine_distortion([disk, line_fit])
    assert est.significant and est.consistent
    assert _within(est.value, DISTORTION, est.sigma)
    # the calibration document keeps the distortion and its covariance
    doc = fit_document(ref)
    doc["distortion"] = combine_distortion([disk, line_fit], used=line_fit.value).to_dict()
    cal = Calibration.from_document(json.loads(json.dumps(doc)))
    assert cal.detector.distortion == pytest.approx(line_fit.value, abs=1e-15)
    np.testing.assert_allclose(cal.distortion_covariance, line_fit.covariance, rtol=1e-12)

    # the strained pattern, fitted with the calibration held; the shears are held at
    # zero so that one [2 3 0] pattern determines the normal strains well
    det2 = detect_lines(strained)
    fits = {}
    for name, c in (("corrected", cal), ("plain", Calibration(
            cal.kv, cal.detector.replace(distortion=(0.0, 0.0))))):
        fits[name] = refine_image(SI, ZONE, det2, x_axis=X_AXIS, calibration=c,
                                  hold=("eyz", "exz", "exy"))
        assert fits[name].success, fits[name].message
    corrected, plain = fits["corrected"], fits["plain"]
    assert corrected.detector.distortion == pytest.approx(cal.detector.distortion)
    assert corrected.detector_sigma["distortion"] is None  # held, not refitted
    # Green-Lagrange of (I + e) A is e + e^2 / 2 for a symmetric e (DESIGN.md)
    truth = np.diag(STRAIN + STRAIN @ STRAIN / 2)
    sigma = np.sqrt(np.diag(corrected.strain_covariance))[:3]
    assert _within(corrected.strain_voigt[:3], truth, sigma)
    # without the correction the distortion is left in the residuals: the fit is worse
    # and its sigmas, scaled by the residual scatter, grow
    assert corrected.rms_px < plain.rms_px
    assert np.all(sigma < np.sqrt(np.diag(plain.strain_covariance))[:3])


def test_cli_reference_then_strained(distorted_pair, tmp_path, capsys):
    reference, strained = distorted_pair
    np.save(tmp_path / "ref.npy", reference)
    np.save(tmp_path / "strained.npy", strained)
    base = ["refine", "Si", "--zone", *ZONE, "--x-axis", *X_AXIS]
    code, out, err = run_cli(capsys, *base, "--image", tmp_path / "ref.npy", "--model", "fixed",
                             "--free", "kv", "--disk-mrad", 6, "--rotation-deg", ROTATION_DEG,
                             "--json", tmp_path / "cal.json")
    assert code == 0, err
    assert "disk outline" in out and "line fit" in out and "held" in out
    doc = json.loads((tmp_path / "cal.json").read_text())
    block = doc["distortion"]
    assert block["significant"]
    line_fit = next(m for m in block["measurements"] if m["source"] == "line fit")
    assert block["used"] == pytest.approx(line_fit["value"])
    assert doc["detector"]["distortion"] == pytest.approx(line_fit["value"])
    assert _within(block["value"], DISTORTION, block["sigma"])
    code, out, err = run_cli(capsys, *base, "--image", tmp_path / "strained.npy",
                             "--calibration", tmp_path / "cal.json", "--hold", "eyz", "exz",
                             "exy", "--json", tmp_path / "s.json")
    assert code in (0, 3), err  # 3 only for a plausibility check unrelated to distortion
    assert "held from the calibration" in out
    strained_doc = json.loads((tmp_path / "s.json").read_text())
    assert strained_doc["detector"]["distortion"] == pytest.approx(line_fit["value"])
    assert strained_doc["distortion"]["consistent"]


def test_cli_plain_similarity_without_distortion(tmp_path, capsys):
    st = PhysicalSettings(shape=SHAPE, seed=31)
    image, _ = render_physical(SI, ZONE, 200, 6, st, x_axis=X_AXIS)
    np.save(tmp_path / "ref.npy", image)
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", *ZONE, "--x-axis", *X_AXIS,
                             "--image", tmp_path / "ref.npy", "--model", "fixed", "--free",
                             "kv", "--disk-mrad", 6, "--rotation-deg", ROTATION_DEG,
                             "--json", tmp_path / "cal.json")
    assert code == 0, err
    doc = json.loads((tmp_path / "cal.json").read_text())
    assert not doc["distortion"]["significant"]
    assert doc["distortion"]["used"] == [0.0, 0.0] and doc["detector"]["distortion"] == [0, 0]
    assert "plain similarity" in out


def test_map_holds_the_calibrated_distortion():
    from laueline.maps import map_strain, plan_scan

    ref, truth = render_physical(SI, ZONE, 200, 6, PhysicalSettings(
        shape=SHAPE, distortion=DISTORTION, seed=41), x_axis=X_AXIS)
    scan = np.stack([render_physical(SI, ZONE, 200, 6, PhysicalSettings(
        shape=SHAPE, distortion=DISTORTION, seed=42 + i), x_axis=X_AXIS, strain=STRAIN)[0]
        for i in range(3)])
    names = ("exx", "eyy", "ezz", "eyz", "exz", "exy")
    results = {}
    for label, distortion in (("held", DISTORTION), ("none", (0.0, 0.0))):
        det = Detector(tuple(truth["center_px"]), truth["scale_px_per_mrad"], ROTATION_DEG,
                       False, distortion)
        plan = plan_scan(SI, ZONE, Calibration(200.0, det), SHAPE, disk_mrad=6.0,
                         x_axis=X_AXIS, systematic_covariance=None)
        assert plan.settings["detector"]["distortion"] == pytest.approx(list(distortion))
        ds = map_strain(scan, plan, n_workers=1, progress=False)
        assert ds["ok"].values.all()
        results[label] = (np.stack([ds[n].values for n in names], 1),
                          np.stack([ds[f"sigma_{n}"].values for n in names], 1))
    value, sigma = results["held"]
    truth_voigt = np.array([*np.diag(STRAIN + STRAIN @ STRAIN / 2), 0, 0, 0])
    # each pattern within 4 sigma (18 normalised errors; 4 sigma keeps a false alarm
    # below 0.1 % for the set, common practice)
    assert np.all(np.abs(value - truth_voigt) < 4 * sigma)
    # a plain similarity leaves the distortion in the profile residuals: the
    # uncertainties, scaled by that scatter, are several times larger
    assert np.all(np.median(results["none"][1], axis=0) > 2 * np.median(sigma, axis=0))


def test_cli_line_fit_overrules_a_marginal_disk_outline(tmp_path, capsys, monkeypatch):
    """A disk outline just significant, lines that show nothing: the combined test
    decides, and the reference is fitted again as a plain similarity."""
    import dataclasses

    import laueline.images.detect as detect

    st = PhysicalSettings(shape=SHAPE, seed=33)
    image, _ = render_physical(SI, ZONE, 200, 6, st, x_axis=X_AXIS)
    np.save(tmp_path / "ref.npy", image)
    original = detect.detect_lines

    def marginal_outline(*args, **kwargs):
        det = original(*args, **kwargs)
        # q = (0.0008 / 0.00025)^2 = 10.2, just above the 9.21 of the 99 % test
        disk = dataclasses.replace(det.disk, distortion=(0.0008, 0.0),
                                   distortion_sigma=(0.00025, 0.00025),
                                   distortion_significant=True)
        return dataclasses.replace(det, disk=disk)

    monkeypatch.setattr(detect, "detect_lines", marginal_outline)
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", *ZONE, "--x-axis", *X_AXIS,
                             "--image", tmp_path / "ref.npy", "--model", "fixed", "--free",
                             "kv", "--disk-mrad", 6, "--rotation-deg", ROTATION_DEG,
                             "--json", tmp_path / "cal.json")
    assert code == 0, err
    block = json.loads((tmp_path / "cal.json").read_text())["distortion"]
    sources = [m["source"] for m in block["measurements"]]
    assert sources == ["disk outline", "line fit"]
    line_fit = block["measurements"][1]
    # the line fit of an undistorted pattern finds nothing beyond its noise (99 % test)
    assert not line_fit["significant"]
    # combined: the two weighed by their inverse covariances, below the 99 % quantile
    assert block["chi2"] < stats.chi2.ppf(0.99, 2) and not block["significant"]
    assert block["used"] == [0.0, 0.0] and "plain similarity" in block["note"]
    doc = json.loads((tmp_path / "cal.json").read_text())
    assert doc["detector"]["distortion"] == [0, 0]
    assert doc["detector"]["sigma"]["distortion"] is None  # fitted again, held
