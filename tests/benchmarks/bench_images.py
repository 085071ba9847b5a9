"""Timing of detection and image-driven refinement (not part of the CI run).

    python tests/benchmarks/bench_images.py

1. Detection on a 512 x 512 rendered Si [2 3 0] pattern (dose 2000): median
   of 11, against a baseline of scikit-image's Canny edge map of the same
   image (a single general-purpose pass, no fitting).
2. Image to strain: detection plus the strain fit with a calibration given,
   median of 7, against the labelled-crossing fit of the same strain (from the
   truth crossings) as the baseline.
3. Seeded detection (a predicted pattern and a detector given) on a 512 x 512
   pattern with two-beam line profiles and projector distortion
   (tests/physical_render.py), median of 11; blind detection of the same
   image for comparison.
4. Blind detection on a 2048 x 2048 pattern whose lines are about 9 px wide,
   median of 3, with the number of lines kept against the number drawn and
   the peak memory of one more run (tracemalloc: numpy's allocations are
   traced) beside the process's peak resident size.
Items 3 and 4 are measured against reading the image from a TIFF file plus
one Gaussian filter (sigma 2 px) over it, in the same run.  Run on one core:

    OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 MKL_NUM_THREADS=1 \
        python tests/benchmarks/bench_images.py
"""


import numpy as np

from laueline import read_crystal
from laueline.images.detect import detect_lines
from laueline.images.render import RenderSettings, render_pattern
from laueline.points import Points
from laueline.refine import refine, refine_image
from timing import median_time  # noqa: E402

import os
import resource
import sys
import tempfile
import tracemalloc
sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))
from physical_render import PhysicalSettings, render_physical  # noqa: E402



def main():
    from skimage.feature import canny

    si = read_crystal("Si")
    zone, x_axis = (2, 3, 0), (0, 0, 4)
    strain = [1e-3, -5e-4, 2e-3, 2e-4, -3e-4, 1e-4]
    ref, _ = render_pattern(si, zone, 197.3, 6, RenderSettings(rotation_deg=17, seed=1),
                            x_axis=x_axis)
    image, truth = render_pattern(si, zone, 197.3, 6, RenderSettings(rotation_deg=17, seed=2),
                                  x_axis=x_axis, strain=strain)
    cal = refine_image(si, zone, detect_lines(ref), kv=200, model="fixed", free=["kv"],
                       x_axis=x_axis, disk_mrad=6, mirror=False)
    calibration = (cal.kv, cal.detector)
    t_det = median_time(lambda: detect_lines(image), 11)
    t_canny = median_time(lambda: canny(image, sigma=1.5), 11)
    print("1. detection, 512 x 512")
    print(f"   detect_lines (median of 11):     {t_det * 1e3:7.1f} ms")
    print(f"   skimage canny (median of 11):    {t_canny * 1e3:7.1f} ms   ratio {t_det / t_canny:.1f}x")

    def image_to_strain():
        return refine_image(si, zone, detect_lines(image), calibration=calibration,
                            x_axis=x_axis)

    t_img = median_time(image_to_strain, 7)
    pts = Points(np.array([c["xy_px"] for c in truth["crossings"]]),
                 np.array([c["hkl_a"] for c in truth["crossings"]]),
                 np.array([c["hkl_b"] for c in truth["crossings"]]))
    t_pts = median_time(lambda: refine(si, zone, pts, calibration=calibration, x_axis=x_axis,
                                       mirror=False), 7)
    fit = image_to_strain()
    print("2. image to strain, calibration given")
    print(f"   refine --image (median of 7):    {t_img * 1e3:7.1f} ms "
          f"({fit.n_used} lines, rms {fit.rms_px:.3f} px)")
    print(f"   refine on {len(pts)} truth crossings:  {t_pts * 1e3:7.1f} ms   ratio "
          f"{t_img / t_pts:.1f}x")

    seeded_and_large(si)


def _read_and_filter(path):
    from scipy.ndimage import gaussian_filter

    from laueline.images.io import read_image

    return gaussian_filter(read_image(path)[0], 2.0)


def seeded_and_large(si):
    from laueline.detector import Detector
    from laueline.images.detect import detect_seeded, find_disk
    from laueline.images.io import write_image

    zone, x_axis = (2, 3, 0), (0, 0, 4)
    distortion = (0.003, -0.002)
    st = PhysicalSettings(shape=(512, 512), distortion=distortion, seed=3)
    image, truth = render_physical(si, zone, 200, 6, st, x_axis=x_axis)
    detector = Detector(tuple(truth["center_px"]), truth["scale_px_per_mrad"],
                        st.rotation_deg, st.mirror, distortion)
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "p.tif")
        write_image(path, image)
        t_base = median_time(lambda: _read_and_filter(path), 11)
        t_seed = median_time(lambda: detect_seeded(image, truth["pattern"], detector), 11)
        disk = find_disk(image)  # found once, as for the patterns of a scan
        t_seed_disk = median_time(lambda: detect_seeded(image, truth["pattern"], detector,
                                                        disk=disk), 11)
        t_blind = median_time(lambda: detect_lines(image), 3)
    seeded = detect_seeded(image, truth["pattern"], detector)
    blind = detect_lines(image)
    print("3. seeded detection, 512 x 512, two-beam profiles, 0.3 % distortion")
    print(f"   read + Gaussian (median of 11):  {t_base * 1e3:7.1f} ms")
    print(f"   detect_seeded (median of 11):    {t_seed * 1e3:7.1f} ms   ratio "
          f"{t_seed / t_base:.1f}x   ({len(seeded.lines)} of {truth['pattern'].n_lines} "
          "predicted lines found)")
    print(f"   detect_seeded, disk given:       {t_seed_disk * 1e3:7.1f} ms   ratio "
          f"{t_seed_disk / t_base:.1f}x")
    print(f"   detect_lines (median of 3):      {t_blind * 1e3:7.1f} ms   ratio "
          f"{t_blind / t_base:.1f}x   ({len(blind.good_lines)} lines)")

    big, big_truth = render_pattern(si, zone, 200, 6,
                                    RenderSettings(shape=(2048, 2048), rotation_deg=17,
                                                   seed=4, min_strength=0.15),
                                    x_axis=x_axis)
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "big.tif")
        write_image(path, big)
        t_base = median_time(lambda: _read_and_filter(path), 3)
    t_big = median_time(lambda: detect_lines(big), 3)
    tracemalloc.start()
    det = detect_lines(big)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kB on Linux
    width = float(np.median([ln.width_px for ln in det.lines])) if det.lines else float("nan")
    print("4. blind detection, 2048 x 2048")
    print(f"   read + Gaussian (median of 3):   {t_base * 1e3:7.1f} ms")
    print(f"   detect_lines (median of 3):      {t_big * 1e3:7.1f} ms   ratio "
          f"{t_big / t_base:.1f}x   ({len(det.good_lines)} lines kept of "
          f"{len(big_truth['lines'])} drawn, median width {width:.1f} px)")
    print(f"   peak memory of one detection:    {peak / 2 ** 20:7.0f} MiB traced "
          f"(the 32 MiB image itself not counted); process peak resident {rss:.0f} MiB")


if __name__ == "__main__":
    main()
