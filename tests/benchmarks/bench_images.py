"""Timing of detection and image-driven refinement (not part of the CI run).

    python tests/benchmarks/bench_images.py

1. Detection on a 512 x 512 rendered Si [2 3 0] pattern (dose 2000): median
   of 11, against a baseline of scikit-image's Canny edge map of the same
   image (a single general-purpose pass, no fitting).
2. Image to strain: detection plus the strain fit with a calibration given,
   median of 7, against the labelled-crossing fit of the same strain (from the
   truth crossings) as the baseline.
"""


import numpy as np

from laueline import read_crystal
from laueline.images.detect import detect_lines
from laueline.images.render import RenderSettings, render_pattern
from laueline.points import Points
from laueline.refine import refine, refine_image
from timing import median_time  # noqa: E402



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


if __name__ == "__main__":
    main()
