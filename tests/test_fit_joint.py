"""Several zone axes, one strain: crossings from an independent Ewald construction."""

import numpy as np
import pytest
from conftest import ewald_points, green_lagrange_of

from laueline.detector import Detector
from laueline.fit import Calibration, PatternSpec, refine, refine_patterns

E_TRUE = np.array([1.2e-3, -0.8e-3, 0.5e-3, 0.6e-3, -0.4e-3, 0.3e-3])
# Three cyclic permutations of [2 3 0]: equivalent by the 3-fold axis of m-3m,
# so each is a rich HOLZ pattern, yet they look along three different
# directions of the crystal (about 62 deg apart), as a tilt series would.
ZONES = [((2, 3, 0), (0, 0, 4)), ((0, 2, 3), (4, 0, 0)), ((3, 0, 2), (0, 4, 0))]
# invented detectors of the three records (px, px/mrad, deg)
DETECTORS = [Detector((256.4, 249.7), 40.0, 17.0), Detector((261.0, 240.2), 40.0, 52.0),
             Detector((250.3, 255.9), 40.0, -33.0)]


def _specs(si, n_zones, noise_px=0.0, seed=0, n=40):
    rng = np.random.default_rng(seed)
    specs = []
    for (zone, x_axis), det in list(zip(ZONES, DETECTORS))[:n_zones]:
        pts = ewald_points(si, zone, x_axis, E_TRUE, det, n=n, noise_px=noise_px, rng=rng)
        # the calibration holds voltage and scale; centre and rotation start a little off
        start = det.replace(center_px=(det.center_px[0] + 3, det.center_px[1] - 2),
                            rotation_deg=det.rotation_deg + 1.5)
        specs.append(PatternSpec(zone, points=pts, x_axis=x_axis,
                                 calibration=Calibration(200.0, start)))
    return specs


@pytest.mark.parametrize("n_zones", [2, 3])
def test_joint_fit_recovers_full_tensor_noise_free(si, n_zones):
    fit = refine_patterns(si, _specs(si, n_zones))
    assert fit.success and len(fit.patterns) == n_zones
    # The Ewald construction and the fit's loci agree to ~1e-9 mrad
    # (test_lines.py); 1e-8 leaves room for the solver tolerance.
    np.testing.assert_allclose(fit.strain_voigt, green_lagrange_of(E_TRUE), atol=1e-8)
    for p, det in zip(fit.patterns, DETECTORS):
        assert p.detector.rotation_deg == pytest.approx(det.rotation_deg, abs=1e-5)
        assert p.rms_px < 1e-4


def test_three_zones_separate_what_one_cannot(si):
    # 0.1 px noise.  One zone axis leaves pairs of components correlated
    # beyond 0.9; three axes bring every correlation below 0.9 and each
    # component within 3 sigma of the truth (a 0.3 % two-sided tail per
    # component for a correct sigma).
    specs = _specs(si, 3, noise_px=0.1, seed=4)
    one = refine(si, specs[0].zone, specs[0].points, x_axis=specs[0].x_axis,
                 calibration=specs[0].calibration)
    three = refine_patterns(si, specs)
    assert one.poorly_separated and not three.poorly_separated

    def worst(cov):
        s = np.sqrt(np.diag(cov))
        c = cov / np.outer(s, s)
        return np.max(np.abs(c - np.eye(6)))

    assert worst(one.strain_covariance) > 0.9 > worst(three.strain_covariance)
    sigma = np.sqrt(np.diag(three.strain_covariance))
    assert np.all(np.abs(three.strain_voigt - green_lagrange_of(E_TRUE)) < 3 * sigma)
    assert np.all(sigma < 1e-4)
    # the document carries one entry per pattern and the covariance split
    doc = three.to_dict()
    assert doc["schema"] == "laueline.fit/2" and len(doc["patterns"]) == 3
    assert np.allclose(doc["strain"]["covariance_voigt_systematic"], 0)
    assert np.allclose(doc["strain"]["covariance_voigt"],
                       doc["strain"]["covariance_voigt_statistical"])
    # a short summary line, and a figure of any pattern
    assert repr(three).startswith("<FitResult success=True") and len(repr(three)) < 300
    assert type(three.plot(pattern=2)).__name__ == "Figure"


@pytest.mark.parametrize("unlabelled", [(True, False), (True, True)])
def test_labelled_and_unlabelled_patterns_in_one_loop(si, unlabelled):
    # patterns without labels have their points assigned to predicted
    # crossings while the fit runs; labelled ones are used as they are: one
    # loop serves both
    specs = _specs(si, 2)
    for spec, bare in zip(specs, unlabelled):
        if bare:
            spec.points = type(spec.points)(spec.points.xy_px.copy())
            spec.mirror = False
    fit = refine_patterns(si, specs)
    assert fit.success and [p.assigned for p in fit.patterns] == list(unlabelled)
    np.testing.assert_allclose(fit.strain_voigt, green_lagrange_of(E_TRUE), atol=1e-8)
