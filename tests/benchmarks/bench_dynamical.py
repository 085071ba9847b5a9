"""Timing of the Bloch-wave engine (not part of the CI run).

    OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 python tests/benchmarks/bench_dynamical.py

1. Minima, depth and width of the 20 strongest HOLZ lines of Si [2 3 0] at
   200 kV, 200 nm (with the beam-set convergence check), once: the target is
   at most 30 s on one core.  Beam count and convergence are printed.
2. The naive route on a subset of the same scans: one dense eigen-solve per
   direction in a Python loop over the same beams, against the batched
   stacks, median of 3; the ratio is printed.
3. A 256 x 256 dynamical disk of Si [2 3 0], 200 kV, 200 nm: the disk
   intensity alone (disk_intensity, image beam set) against the HOLZ bound of
   the line minima (0.005 1/A, the image default before) in the same run;
   the same spread over two processes (wall time); the whole render with the
   truth's minima (dynamical_lines of every line, convergence check
   included): at most 2 min on one core, peak memory at most 2 GB
   (resource.getrusage, maximum resident set).

Wall and CPU (process) times are both printed: on a shared machine the CPU
time is the one-core figure.

    python tests/benchmarks/bench_dynamical.py fit

4. (about 10 min) A consistency check of the corrected fit: crossings of a
   strained Si [2 3 0] pattern moved by the engine's own shifts at the true
   state, fitted kinematically and with the correction; the errors are
   printed along the eigenvectors of the kinematic covariance (the
   well-determined combinations first).  The data come from the engine's
   own model, so this checks the iteration, not the physics.
"""

import resource
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from timing import median_time  # noqa: E402

from laueline import predict, read_crystal  # noqa: E402
from laueline.dynamical import disk_intensity, dynamical_lines, select_beams  # noqa: E402
from laueline.dynamical.beams import _Engine  # noqa: E402
from laueline.dynamical.bloch import excitation_matrices  # noqa: E402
from laueline.frame import incident_wavevectors  # noqa: E402
from laueline.images.render import RenderSettings, render_pattern  # noqa: E402


def strongest_lines():
    si = read_crystal("Si")
    pattern = predict(si, (2, 3, 0), 200.0, 6.0, min_strength=0.05)
    holz = np.flatnonzero(pattern.laue_zone >= 1)
    return pattern, holz[np.argsort(-pattern.strength[holz], kind="stable")[:20]]


def naive_direct(engine, group, t_mrad):
    """One dense complex eigen-solve per direction, in a Python loop."""
    out = []
    for t in t_mrad:
        k = incident_wavevectors(t[None], engine.frame, engine.K)
        diag = excitation_matrices(engine.g[group.exact], k)[0]
        inv = 1.0 / excitation_matrices(engine.g[group.weak], k)[0]
        a = group.coupling - (group.to_weak * inv) @ group.from_weak + np.diag(diag)
        lam, vec = np.linalg.eig(a)
        alpha = np.linalg.solve(vec, np.eye(len(a))[:, 0])
        kn = -k[0] @ engine.frame.beam_direction
        phi0 = vec[0] @ (alpha * np.exp(2j * np.pi * engine.thickness_A * lam / (2 * kn)))
        out.append(abs(phi0) ** 2)
    return np.array(out)


def main():
    pattern, lines = strongest_lines()
    t0, c0 = time.perf_counter(), time.process_time()
    result = dynamical_lines(pattern, 200.0, lines=lines)
    elapsed, cpu = time.perf_counter() - t0, time.process_time() - c0
    points = sum(len(result.shift_mrad[i]) for i in lines)
    print(f"Si [2 3 0], 200 kV, 200 nm: {len(lines)} strongest HOLZ lines, {points} points")
    print(f"  minima, depth, width:  {elapsed:6.1f} s wall, {cpu:6.1f} s CPU "
          f"(target <= 30 s on one core)")
    print(f"  beams: up to {result.n_beams} exact ({result.n_zolz} zero-layer) plus Bethe "
          f"beams; minima change by at most {result.convergence_mrad:.4f} mrad with the "
          f"zero layer 1.3x and the HOLZ bound 2.5x")

    # batched stacks against one eigen-solve per direction, on one line's coarse scan
    beams = select_beams(pattern.crystal, pattern.frame, pattern.beam.wave_number,
                         pattern.disk_mrad)
    engine = _Engine(pattern.crystal, beams, pattern.frame, pattern.beam.wave_number,
                     pattern.beam.kv, 0.1, 2000.0, extra_hkl=pattern.hkl)
    i = lines[0]
    scan = result.locus_mrad[i][:, None, :] + np.linspace(-0.5, 0.5, 17)[None, :, None] * \
        result.normal_points[i][:, None, :]
    scan = scan.reshape(-1, 2)
    group = engine.group(scan, include=engine.index(pattern.hkl[i]))
    batched = group.direct(scan)
    naive = naive_direct(engine, group, scan)
    assert np.allclose(batched, naive, atol=1e-10)
    t_batch = median_time(lambda: group.direct(scan), 3)
    t_naive = median_time(lambda: naive_direct(engine, group, scan), 3)
    print(f"  {len(scan)} directions, {len(group)} exact beams, {len(group.weak)} Bethe beams:")
    print(f"    batched stacks (median of 3):          {t_batch * 1e3:8.1f} ms")
    print(f"    one eigen-solve per direction (loop):  {t_naive * 1e3:8.1f} ms   "
          f"ratio {t_naive / t_batch:.2f}x")

    disk_image_timings(pattern)
    settings = RenderSettings(shape=(256, 256), dose=2000.0, seed=1)
    t0, c0 = time.perf_counter(), time.process_time()
    image, truth = render_pattern(read_crystal("Si"), (2, 3, 0), 200.0, 6.0, settings,
                                  thickness_nm=200.0)
    elapsed, cpu = time.perf_counter() - t0, time.process_time() - c0
    peak_gb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6
    print(f"256 x 256 dynamical render (disk and the truth's minima of {len(truth['lines'])} "
          f"lines): {elapsed:6.1f} s wall, {cpu:6.1f} s CPU (target <= 120 s), peak resident "
          f"memory {peak_gb:.2f} GB (target <= 2 GB), {truth['dynamical']['n_beams_image']} "
          "exact beams at most in the disk")


def disk_points(pattern, n=256):
    """Disk points (mrad) of the pixels of an n x n render with the default scale."""
    scale = 0.42 * n / pattern.disk_mrad
    axis = (np.arange(n) - (n - 1) / 2) / scale
    tx, ty = np.meshgrid(axis, axis)
    return np.stack([tx, ty], axis=-1)[np.hypot(tx, ty) <= pattern.disk_mrad]


def disk_image_timings(pattern):
    """disk_intensity of a 256 x 256 disk: image beam set, the old bound, two processes."""
    points = disk_points(pattern)
    runs = {}
    for name, options in [("image beam set (HOLZ bound 0.002 1/A)", {}),
                          ("HOLZ bound 0.005 1/A (baseline)", {"holz_excitation": 0.005}),
                          ("image beam set, workers=2", {"workers": 2})]:
        t0, c0 = time.perf_counter(), time.process_time()
        values, n_beams = disk_intensity(pattern, points, 200.0, **options)
        runs[name] = (time.perf_counter() - t0, time.process_time() - c0, n_beams, values)
    print(f"256 x 256 disk intensity alone ({len(points)} points inside the disk):")
    base = runs["HOLZ bound 0.005 1/A (baseline)"][1]
    for name, (wall, cpu, n_beams, values) in runs.items():
        extra = "" if "workers" in name else f"   CPU ratio baseline/this {base / cpu:.2f}x"
        print(f"    {name:40s} {wall:6.1f} s wall, {cpu:6.1f} s CPU (this process), "
              f"{n_beams} exact beams at most{extra}")
    first = runs["image beam set (HOLZ bound 0.002 1/A)"][3]
    print(f"    largest intensity change against the baseline: "
          f"{np.max(np.abs(first - runs['HOLZ bound 0.005 1/A (baseline)'][3])):.1e}")


def corrected_fit_check():
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    from conftest import DETECTOR, synthetic_points

    import laueline.dynamical.correction as corr
    from laueline.dynamical import refine_dynamical
    from laueline.points import Points
    from laueline.refine import refine

    si = read_crystal("Si")
    strain = np.array([1e-3, -5e-4, 2e-4, 0.0, 0.0, 3e-4])
    pts = synthetic_points(si, (2, 3, 0), n=40, strain=strain, x_axis=None)
    truth = refine(si, (2, 3, 0), pts, calibration=(200.0, DETECTOR))
    need = corr._hkl_used(truth)
    model, _ = corr._line_shift_model(corr._fitted_pattern(truth, si, need), need, 200.0, 0.1,
                                      check=False)
    rows = [r for r in truth.points if r["used"]]
    d = corr._crossing_corrections_px(truth, model, np.array([r["hkl_a"] for r in rows]),
                                      np.array([r["hkl_b"] for r in rows]))
    data = Points(pts.xy_px + d, pts.hkl_a, pts.hkl_b)
    t0 = time.process_time()
    fit = refine_dynamical(si, (2, 3, 0), data, thickness_nm=200.0,
                           calibration=(200.0, DETECTOR))
    cpu = time.process_time() - t0
    w, v = np.linalg.eigh(fit.kinematic.strain.covariance_voigt)
    print(f"corrected fit: {fit.rounds} rounds, settled {fit.settled}, {cpu:.0f} s CPU")
    print("  sigma along eigenvectors (kinematic):", np.array2string(np.sqrt(w), precision=6))
    print("  kinematic error along them:          ",
          np.array2string(v.T @ (fit.strain_voigt_kinematic - strain), precision=6))
    print("  corrected error along them:          ",
          np.array2string(v.T @ (fit.strain_voigt - strain), precision=6))
    print("  total sigma (stat + syst) of the six:", np.array2string(fit.sigma_voigt,
                                                                      precision=6))


if __name__ == "__main__":
    if sys.argv[1:] == ["fit"]:
        corrected_fit_check()
    else:
        main()
