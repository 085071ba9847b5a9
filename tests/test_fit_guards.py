"""Fits that must not pass: each kind of wrong input ends non-zero with its reason.

The measured crossings come from the independent Ewald construction of
tests/conftest.py; the wrong inputs are those a user makes (points read with
the wrong y direction, swapped labels, a calibration of another structure or
zone axis or one that failed, points given twice, a fixed cell for a strained
region, a sample frame that is not orthonormal).
"""

import json

import numpy as np
import pytest
from conftest import DETECTOR, ewald_points, run_cli

from laueline import read_crystal
from laueline.errors import InputError
from laueline.fit import Calibration, refine
from laueline.points import Points, write_points
from laueline.strain import sample_axes

ZONE, X_AXIS = (2, 3, 0), (0, 0, 4)
CAL = Calibration(200.0, DETECTOR)


@pytest.fixture(scope="module")
def crossings():
    si = read_crystal("Si")
    return si, ewald_points(si, ZONE, X_AXIS, np.zeros(6), DETECTOR, n=60, noise_px=0.2,
                            rng=np.random.default_rng(3))


def _calibration_file(tmp_path, **extra):
    path = tmp_path / "cal.json"
    path.write_text(json.dumps({"schema": "laueline.fit/1", "kv": 200.0,
                                "detector": {**DETECTOR.as_dict(), "y_up": False}, **extra}))
    return path


def test_an_honest_fit_passes_every_check(crossings):
    si, pts = crossings
    fit = refine(si, ZONE, pts, x_axis=X_AXIS, calibration=CAL)
    assert fit.success and fit.plausible, fit.message
    names = {c.name for c in fit.checks}
    assert {"largest_normalised_residual", "residual_rms_mrad", "mirror",
            "calibration_converged"} <= names


def test_points_measured_y_up_read_y_down(tmp_path, capsys, crossings):
    # y counted upward from the bottom of a 512-row image, read as rows: the
    # pattern is mirrored while the calibration holds the detector's mirror
    si, pts = crossings
    path = tmp_path / "up.csv"
    write_points(path, np.c_[pts.xy_px[:, 0], 512.0 - pts.xy_px[:, 1]], pts.hkl_a, pts.hkl_b)
    out_json = tmp_path / "fit.json"
    code, _, err = run_cli(capsys, "refine", "Si", "--zone", *ZONE, "--x-axis", *X_AXIS,
                           "--points", path, "--calibration", _calibration_file(tmp_path),
                           "--json", out_json)
    assert code == 3 and len(err.strip().splitlines()) == 1
    assert "--y-up" in err
    assert json.loads(out_json.read_text())["success"] is False


def test_two_swapped_labels_named(crossings):
    si, pts = crossings
    ha, hb = pts.hkl_a.copy(), pts.hkl_b.copy()
    ha[[5, 30]], hb[[5, 30]] = ha[[30, 5]], hb[[30, 5]]
    fit = refine(si, ZONE, Points(pts.xy_px, ha, hb), x_axis=X_AXIS, calibration=CAL)
    assert not fit.success
    assert "point 6" in fit.message and "point 31" in fit.message and "--robust" in fit.message


@pytest.mark.parametrize("cal, words", [
    (Calibration(200.0, DETECTOR, structure="Ge", formula="Ge"), "made on Ge"),
    (Calibration(200.0, DETECTOR, structure="Si", zone=(1, 1, 0)), "zone [1, 1, 0]"),
    (Calibration(200.0, DETECTOR, converged=False), "did not converge"),
])
def test_a_calibration_from_elsewhere_is_refused(crossings, cal, words):
    si, pts = crossings
    fit = refine(si, ZONE, pts, x_axis=X_AXIS, calibration=cal)
    assert not fit.success and words in fit.message


def test_calibration_from_another_structure_exits_3(tmp_path, capsys, crossings):
    si, pts = crossings
    path = tmp_path / "p.csv"
    write_points(path, pts.xy_px, pts.hkl_a, pts.hkl_b)
    cal = _calibration_file(tmp_path, structure={"name": "GaAs", "formula": "GaAs"})
    code, _, err = run_cli(capsys, "refine", "Si", "--zone", *ZONE, "--x-axis", *X_AXIS,
                           "--points", path, "--calibration", cal)
    assert code == 3 and "GaAs" in err and len(err.strip().splitlines()) == 1


def test_every_point_given_twice_is_refused(tmp_path, capsys, crossings):
    # counted twice, every sigma would shrink by sqrt(2): refused at the door
    si, pts = crossings
    path = tmp_path / "twice.csv"
    write_points(path, np.concatenate([pts.xy_px, pts.xy_px]),
                 np.concatenate([pts.hkl_a, pts.hkl_a]), np.concatenate([pts.hkl_b, pts.hkl_b]))
    out_json = tmp_path / "fit.json"
    code, _, err = run_cli(capsys, "refine", "Si", "--zone", *ZONE, "--x-axis", *X_AXIS,
                           "--points", path, "--calibration", _calibration_file(tmp_path),
                           "--json", out_json)
    assert code == 2 and "repeat" in err and not out_json.exists()
    # the same crossing labelled twice at slightly different places is refused too
    xy = np.concatenate([pts.xy_px, pts.xy_px[:3] + 0.5])
    with pytest.raises(InputError, match="label pair"):
        refine(si, ZONE, Points(xy, np.concatenate([pts.hkl_a, pts.hkl_a[:3]]),
                                np.concatenate([pts.hkl_b, pts.hkl_b[:3]])),
               x_axis=X_AXIS, calibration=CAL)


def test_fixed_cell_fitted_to_a_strained_region(crossings):
    # 2e-3 / -1e-3 of tetragonal strain (invented) fitted with the reference cell
    si, _ = crossings
    pts = ewald_points(si, ZONE, X_AXIS, [2e-3, 0, -1e-3, 0, 0, 0], DETECTOR, n=60,
                       noise_px=0.2, rng=np.random.default_rng(8))
    fit = refine(si, ZONE, pts, x_axis=X_AXIS, calibration=CAL, model="fixed")
    assert not fit.success and "fixed cell" in fit.message
    # the strain model describes the same points
    assert refine(si, ZONE, pts, x_axis=X_AXIS, calibration=CAL).success


def test_sample_x_not_normal_to_z_is_refused():
    si = read_crystal("Si")
    with pytest.raises(InputError, match="not normal"):
        sample_axes(si.basis, (1, 1, 1), (0, 0, 1))
    # normal directions give an orthonormal right-handed frame
    axes = sample_axes(si.basis, (1, 1, 0), (0, 0, 1))
    np.testing.assert_allclose(axes @ axes.T, np.eye(3), atol=1e-12)
    assert np.linalg.det(axes) == pytest.approx(1.0)


def test_line_sigma_option_and_its_report(tmp_path, capsys, crossings):
    si, pts = crossings
    path = tmp_path / "p.csv"
    write_points(path, pts.xy_px, pts.hkl_a, pts.hkl_b)
    cal = _calibration_file(tmp_path)
    out_json = tmp_path / "fit.json"
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", *ZONE, "--x-axis", *X_AXIS,
                             "--points", path, "--calibration", cal, "--line-sigma-px", 0.3,
                             "--json", out_json)
    assert code == 0, err
    doc = json.loads(out_json.read_text())
    assert doc["line_sigma_px"]["value"] == 0.3 and doc["line_sigma_px"]["source"] == "given"
    assert "line sigma 0.3 px (given)" in out
    code, _, err = run_cli(capsys, "refine", "Si", "--zone", *ZONE, "--x-axis", *X_AXIS,
                           "--points", path, "--calibration", cal, "--line-sigma-px", -1)
    assert code == 2 and "--line-sigma-px" in err and len(err.strip().splitlines()) == 1


def test_systematic_part_adds_to_the_total(crossings):
    # independent parts add (add_systematic); every reported sigma is the total
    si, pts = crossings
    sys_cov = np.diag(np.full(6, 1e-4)) ** 2
    plain = refine(si, ZONE, pts, x_axis=X_AXIS, calibration=CAL)
    fit = refine(si, ZONE, pts, x_axis=X_AXIS, calibration=CAL, systematic_covariance=sys_cov)
    np.testing.assert_allclose(fit.strain_covariance_statistical,
                               plain.strain_covariance_statistical, rtol=1e-9, atol=0)
    np.testing.assert_allclose(fit.strain_covariance,
                               fit.strain_covariance_statistical + sys_cov, rtol=1e-12)
    np.testing.assert_allclose(fit.to_dict()["strain"]["covariance_voigt_systematic"], sys_cov)
    total = np.sqrt(np.diag(fit.strain_covariance))
    np.testing.assert_allclose(np.ravel(fit.strain.green_lagrange_sigma)[[0, 4, 8]],
                               total[:3], rtol=1e-9)


def test_calibration_from_another_detector_size():
    # an image fit remembers its image shape; a calibration made on 512 x 512 px
    # images does not serve a 256 x 256 px one (another binning or camera)
    from laueline.fit import refine_image
    from laueline.images.detect import detect_lines
    from laueline.images.render import RenderSettings, render_pattern

    si = read_crystal("Si")
    image, truth = render_pattern(si, ZONE, 200, 6, RenderSettings(rotation_deg=17, seed=3,
                                                                  shape=(256, 256)),
                                  x_axis=X_AXIS)
    detection = detect_lines(image)
    ref = refine_image(si, ZONE, detection, x_axis=X_AXIS, disk_mrad=6, mirror=False)
    assert ref.success, ref.message
    cal = ref.calibration()
    assert cal.settings["image_shape"] == [256, 256]
    same = refine_image(si, ZONE, detection, x_axis=X_AXIS, calibration=cal)
    assert any(c.name == "calibration_detector" and c.passed for c in same.checks)
    other = Calibration(cal.kv, cal.detector, "Si", cal.formula, cal.zone, cal.x_axis,
                        {**cal.settings, "image_shape": [512, 512]})
    fit = refine_image(si, ZONE, detection, x_axis=X_AXIS, calibration=other)
    assert not fit.success and "512 x 512" in fit.message
