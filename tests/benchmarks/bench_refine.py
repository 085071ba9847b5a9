"""Timing and precision of refinement (not part of the CI run).

    python tests/benchmarks/bench_refine.py

1. 40 labelled crossings, strain model plus centre and rotation: median per
   fit, against a baseline of the same fit with scipy's own finite-difference
   Jacobian and trust-region solver (least_squares defaults).
2. 40 unlabelled crossings with rotation and mirror search: median per fit.
3. Joint fit of three zone axes with 40 labelled crossings each (one strain,
   three detectors): median per fit against the single-pattern fit of the
   same run (the target is at most 3x).
4. Precision on Si [2 3 0], 200 kV, 6 mrad disk, 40 px/mrad, 40 crossings,
   0.1 px noise, after calibration: tetragonal a and c, and each component of
   the full strain model, Monte-Carlo scatter against the Jacobian prediction.
"""

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from conftest import DETECTOR, synthetic_points  # noqa: E402

from laueline import read_crystal  # noqa: E402
from laueline.detector import Detector  # noqa: E402
from laueline.fit import Calibration, PatternSpec, refine, refine_patterns  # noqa: E402
from timing import median_time  # noqa: E402

ZONE = (2, 3, 0)
E = np.array([2e-3, -1.5e-3, 1e-3, 5e-4, -7e-4, 3e-4])
CAL = (200.0, DETECTOR)



def baseline_fit(si, pts):
    """The same model, fitted with least_squares defaults (2-point Jacobian, trf)."""
    from scipy.optimize import least_squares

    from laueline.lines import crossing_positions
    from laueline.optics import wave_number

    K = wave_number(200.0)

    def fun(p):
        e = p[:6]
        strain = np.array([[e[0], e[5], e[4]], [e[5], e[1], e[3]], [e[4], e[3], e[2]]])
        t = crossing_positions((np.eye(3) + strain) @ si.basis, ZONE, (0, 0, 4), K,
                               pts.hkl_a, pts.hkl_b)
        det = DETECTOR.replace(center_px=(p[6], p[7]), rotation_deg=p[8])
        return (det.to_pixels(t) - pts.xy_px).ravel()

    return least_squares(fun, np.r_[np.zeros(6), 250.0, 250.0, 15.0])


def main():
    si = read_crystal("Si")
    rng = np.random.default_rng(1)
    pts = synthetic_points(si, ZONE, strain=E, noise_px=0.1, rng=rng)
    refine(si, ZONE, pts, x_axis=(0, 0, 4), calibration=CAL)  # imports, caches
    t_fit = median_time(lambda: refine(si, ZONE, pts, x_axis=(0, 0, 4), calibration=CAL), 21)
    t_base = median_time(lambda: baseline_fit(si, pts), 7)
    print("1. 40 labelled crossings, strain + centre + rotation")
    print(f"   laueline refine (median of 21):         {t_fit * 1e3:7.1f} ms")
    print(f"   least_squares defaults (median of 7):   {t_base * 1e3:7.1f} ms"
          f"   ratio {t_base / t_fit:.1f}x")

    bare = synthetic_points(si, ZONE, strain=E, noise_px=0.1, rng=rng, labelled=False)
    t_un = median_time(lambda: refine(si, ZONE, bare, x_axis=(0, 0, 4),
                                      scale_px_per_mrad=40.0, hold=["scale"]), 7)
    print("2. 40 unlabelled crossings, rotation and mirror searched, centre unknown")
    print(f"   laueline refine (median of 7):          {t_un * 1e3:7.1f} ms")

    zones = [((2, 3, 0), (0, 0, 4)), ((0, 2, 3), (4, 0, 0)), ((3, 0, 2), (0, 4, 0))]
    specs = []
    for k, (zone, x_axis) in enumerate(zones):
        det = Detector((256.4, 249.7), 40.0, 17.0 + 35 * k)
        p = synthetic_points(si, zone, strain=E, noise_px=0.1, rng=rng, x_axis=x_axis,
                             detector=det)
        specs.append(PatternSpec(zone, points=p, x_axis=x_axis,
                                 calibration=Calibration(200.0, det)))
    single = specs[0]
    refine_patterns(si, specs)
    t_one = median_time(lambda: refine_patterns(si, [single]), 21)
    t_three = median_time(lambda: refine_patterns(si, specs), 21)
    print("3. joint fit, three zone axes x 40 labelled crossings, calibrations held")
    print(f"   one pattern (median of 21):             {t_one * 1e3:7.1f} ms")
    print(f"   three patterns (median of 21):          {t_three * 1e3:7.1f} ms"
          f"   ratio {t_three / t_one:.2f}x (target <= 3)")

    print("4. precision, Si [2 3 0], 200 kV, 6 mrad, 40 px/mrad, 40 crossings, 0.1 px")
    a_si = si.cell[0]
    tet = si.with_cell(a_si * (1 - 1e-3), a_si * (1 - 1e-3), a_si * (1 + 2e-3), 90, 90, 90)
    runs, sig = [], []
    for _ in range(200):
        p = synthetic_points(tet, ZONE, noise_px=0.1, rng=rng)
        f = refine(si, ZONE, p, model="tetragonal", x_axis=(0, 0, 4), calibration=CAL,
                   mirror=False)
        runs.append([f.parameter("a")[0], f.parameter("c")[0]])
        sig.append([f.parameter("a")[1], f.parameter("c")[1]])
    runs, sig = np.array(runs), np.array(sig)
    obs = runs.std(axis=0, ddof=1) / runs.mean(axis=0)
    pred = np.sqrt(np.mean(sig ** 2, axis=0)) / runs.mean(axis=0)
    print(f"   tetragonal: sigma(a)/a = {obs[0]:.2e} (predicted {pred[0]:.2e}), "
          f"sigma(c)/c = {obs[1]:.2e} (predicted {pred[1]:.2e})")
    runs, sig = [], []
    for _ in range(200):
        p = synthetic_points(si, ZONE, strain=E, noise_px=0.1, rng=rng)
        f = refine(si, ZONE, p, x_axis=(0, 0, 4), calibration=CAL, mirror=False)
        runs.append(f.values[:6])
        sig.append(f.sigmas[:6])
    obs = np.std(runs, axis=0, ddof=1)
    pred = np.sqrt(np.mean(np.square(sig), axis=0))
    print("   full strain model, 1-sigma per component (Monte Carlo of 200 / Jacobian):")
    for name, o, q in zip(["exx", "eyy", "ezz", "eyz", "exz", "exy"], obs, pred):
        print(f"     {name}: {o:.2e} / {q:.2e}   ratio {q / o:.2f}")


if __name__ == "__main__":
    main()
