"""Write the dynamical test patterns of tests/data/dynamical/.

    OMP_NUM_THREADS=1 python tests/data/make_dynamical_patterns.py [--workers N] [--zone U V W]

For each zone axis, two bright-field central disks of silicon at 200 kV,
rendered with the Bloch-wave engine (:func:`laueline.images.render.render_pattern`
with a thickness): an unstrained reference and a strained region of the same
200 nm foil, each with the truth document the renderer writes (exact loci,
dynamical minima of every line, detector, strain), as

    si-<uvw>-reference.tif / .truth.json
    si-<uvw>-strained.tif  / .truth.json
    settings.json          what every file was made with

The images are 256 x 256 uint16 counts in zlib-compressed TIFF, with a
Gaussian point-spread function of 0.9 px (sigma), Poisson noise at 1500
counts per pixel on the disk plateau, a 10 % background gradient, an
off-centre disk and a rotated detector.

Independence from the refinement: the image and its minima are computed
with a LARGER beam set than :func:`laueline.dynamical.dynamical_lines` and
the corrected refinement use by default: zero-layer beams up to 2.5 1/A
exactly (1.25 times the default 2.0, 1.67 times the image default 1.5) and
HOLZ beams exactly where their excitation error comes below 0.01 1/A (twice
the default 0.005, five times the image default 0.002).  A refinement with
its defaults therefore meets minima that its own beam set did not make.
Each pattern takes about four minutes of one core (81-84 exact beams at
most); larger factors, such as 1.5 and 3, would raise that to about half an
hour.

The strain of the strained region (in the Cartesian frame of the reference
cell, exx eyy ezz eyz exz exy) has a tetragonal part, a contraction in the
x-y plane with an expansion along z, and two shears; it is invented for
these tests.
"""

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np
import tifffile

from laueline import read_crystal
from laueline.images.render import RenderSettings, render_pattern

HERE = Path(__file__).resolve().parent / "dynamical"

KV = 200.0
THICKNESS_NM = 200.0
ABSORPTION_RATIO = 0.1
DISK_MRAD = 6.0
#: (zero-layer |g| limit, HOLZ excitation-error bound), 1/angstrom
BEAM_SET = (2.5, 0.01)
#: exx eyy ezz eyz exz exy: tetragonal -4e-4, -4e-4, +6e-4 plus shears
STRAIN = (-4.0e-4, -4.0e-4, 6.0e-4, -2.0e-4, 0.0, 3.0e-4)
ZONES = {(2, 3, 0): (0, 0, 4), (3, 4, 0): (0, 0, 4)}
DETECTOR = {"shape": (256, 256), "center_px": (129.3, 126.6), "scale_px_per_mrad": 17.5,
            "rotation_deg": 17.0, "mirror": False, "background_tilt": 0.1,
            "background_angle_deg": 60.0, "blur_px": 0.9, "dose": 1500.0,
            "min_strength": 0.03}
SEEDS = {"reference": 21, "strained": 22}


def file_stem(zone, region):
    return f"si-{''.join(map(str, zone))}-{region}"


def render(zone, region, workers=1):
    """Image (uint16) and truth of one fixture."""
    si = read_crystal("Si")
    settings = RenderSettings(seed=SEEDS[region], **DETECTOR)
    strain = None if region == "reference" else np.array(STRAIN)
    image, truth = render_pattern(si, zone, KV, DISK_MRAD, settings, strain=strain,
                                  x_axis=ZONES[zone], thickness_nm=THICKNESS_NM,
                                  absorption_ratio=ABSORPTION_RATIO, beam_set=BEAM_SET,
                                  workers=workers)
    counts = np.clip(np.round(image), 0, np.iinfo(np.uint16).max).astype(np.uint16)
    truth["region"] = region
    truth["strain_voigt"] = None if strain is None else list(STRAIN)
    return counts, truth


def settings_document():
    return {
        "generator": "tests/data/make_dynamical_patterns.py",
        "structure": "Si (bundled)", "kv": KV, "thickness_nm": THICKNESS_NM,
        "absorption_ratio": ABSORPTION_RATIO, "disk_mrad": DISK_MRAD,
        "beam_set": {"zero_layer_gmax_inv_A": BEAM_SET[0],
                     "holz_excitation_inv_A": BEAM_SET[1],
                     "note": "larger than the defaults of dynamical_lines (2.0, 0.005) and "
                             "of disk images (1.5, 0.002)"},
        "strain_voigt": list(STRAIN), "strain_order": "exx eyy ezz eyz exz exy",
        "strain_frame": "Cartesian frame of the reference cell (x along a)",
        "zones": [{"zone": list(z), "x_axis": list(x)} for z, x in ZONES.items()],
        "detector": {k: (list(v) if isinstance(v, tuple) else v) for k, v in DETECTOR.items()},
        "seeds": SEEDS,
        "image": "uint16 counts, zlib-compressed TIFF, rows top to bottom",
    }


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--workers", type=int, default=1)
    ap.add_argument("--zone", nargs=3, type=int, action="append",
                    help="render only this zone axis (repeatable)")
    args = ap.parse_args(argv)
    zones = [tuple(z) for z in args.zone] if args.zone else list(ZONES)
    HERE.mkdir(exist_ok=True)
    (HERE / "settings.json").write_text(json.dumps(settings_document(), indent=1) + "\n")
    for zone in zones:
        for region in ("reference", "strained"):
            t0 = time.perf_counter()
            counts, truth = render(zone, region, args.workers)
            stem = file_stem(zone, region)
            truth["image"] = f"{stem}.tif"
            tifffile.imwrite(HERE / f"{stem}.tif", counts, compression="zlib")
            (HERE / f"{stem}.truth.json").write_text(json.dumps(truth) + "\n")
            print(f"{stem}: {time.perf_counter() - t0:.0f} s, "
                  f"{truth['dynamical']['n_beams_image']} exact beams at most", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
