# %% [markdown]
# # The demonstration scenario from Python
#
# An invented silicon channel (see `examples/README.md`), compressed along
# [1 1 0] between two stressor pads, seen along Si [2 3 0] at a nominal
# 200 kV.  This script walks the job `laueline demo` does, with the library
# functions a notebook would call: predict the pattern, calibrate on the
# unstrained reference, measure the channel's strain and stress, then plan
# a session and measure a foil thickness.
#
# Run it as a script (`python examples/walkthrough.py`) or cell by cell in an
# editor that knows `# %%` cells, from the top of the checkout.  Figures are
# written into `laueline-demo/` (git ignores it); in a notebook they show
# themselves.

# %%
import json
import os
from pathlib import Path

import numpy as np

import laueline

try:
    EXAMPLES = Path(__file__).resolve().parent
except NameError:  # a notebook started from the top of the checkout
    EXAMPLES = Path("examples").resolve()
OUT = Path(os.environ.get("LAUELINE_OUT", "laueline-demo"))
OUT.mkdir(exist_ok=True)
print("laueline", laueline.__version__, "- examples in", EXAMPLES)

# %% [markdown]
# ## 1. What to expect at the microscope
# `predict` returns a `Pattern`: its repr is a one-line summary, its tables
# are pandas DataFrames and `plot()` gives the labelled figure.

# %%
si = laueline.read_crystal("Si")
pattern = laueline.predict(si, zone=[2, 3, 0], kv=200, disk_mrad=6, x_axis=[0, 0, 4])
print(pattern)
try:
    print(pattern.to_dataframe("lines").sort_values("strength", ascending=False).head(8))
except ImportError:  # pandas is optional: pip install "laueline[tables]"
    print(pattern.to_dict()["lines"][0])
pattern.plot().savefig(OUT / "walkthrough-pattern.png", dpi=120)

# %% [markdown]
# ## 2. Calibrate on the reference region
# Find the lines of the reference image, then free the voltage with the
# cell held at its reference value: the result is the effective voltage and
# the camera scale the channel fit will hold.

# %%
image, saturation = laueline.read_image(EXAMPLES / "reference.tif")
detection = laueline.detect_lines(image, saturation=saturation)
print(len(detection.good_lines), "lines found in the reference pattern")
calibration = laueline.refine_image(si, [2, 3, 0], detection, kv=200, model="fixed",
                                    free=["kv"], x_axis=[0, 0, 4], disk_mrad=6, mirror=False)
kv, kv_sigma = calibration.parameter("kv")
print(f"effective voltage {kv:.3f} +- {kv_sigma:.3f} kV, "
      f"rms {calibration.rms_px:.3f} px")

# %% [markdown]
# ## 3. Strain and stress of the channel
# The same camera length and voltage: hold both and fit the six strain
# components, reported in the sample frame x' = [1 1 0], z' = [0 0 1].

# %%
channel, saturation = laueline.read_image(EXAMPLES / "channel.tif")
axes = laueline.sample_axes(si.basis, [1, 1, 0], [0, 0, 1])
fit = laueline.refine_image(si, [2, 3, 0], laueline.detect_lines(channel, saturation=saturation),
                            calibration=(calibration.kv, calibration.detector),
                            x_axis=[0, 0, 4],
                            stiffness=laueline.cubic_stiffness(165.7, 63.9, 79.6),
                            sample_axes=axes)
strain = fit.strain.sample_green_lagrange
sigma = fit.strain.sample_green_lagrange_sigma
for name, (i, j) in zip(["xx", "yy", "zz"], [(0, 0), (1, 1), (2, 2)]):
    print(f"e'{name} = {strain[i, j]:+.2e} +- {sigma[i, j]:.1e}")
print(f"stress along the channel {fit.strain.sample_stress_GPa[0, 0]:+.2f} GPa")

# %% [markdown]
# The truth of the invented scenario sits beside the image:

# %%
truth = json.loads((EXAMPLES / "channel.truth.json").read_text())
print("truth e'xx e'yy e'zz:", truth["scenario"]["strain_sample"][:3])

# %% [markdown]
# ## 4. The same from crossings digitised by hand
# `reference.csv` and `channel.csv` hold labelled crossings of the two
# patterns, as a person would click them.

# %%
points = laueline.read_points(EXAMPLES / "reference.csv")
cal_points = laueline.refine(si, [2, 3, 0], points, kv=200, model="fixed", free=["kv"])
fit_points = laueline.refine(si, [2, 3, 0], laueline.read_points(EXAMPLES / "channel.csv"),
                             calibration=(cal_points.kv, cal_points.detector),
                             sample_axes=axes)
print(f"from {fit_points.n_used} hand-picked crossings: e'xx = "
      f"{fit_points.strain.sample_green_lagrange[0, 0]:+.2e} +- "
      f"{fit_points.strain.sample_green_lagrange_sigma[0, 0]:.1e}")

# %% [markdown]
# ## 5. Before the next session: which zone axis, and how thick is the foil?

# %%
plan = laueline.survey(si, kv=200, disk_mrad=6, near=[2, 3, 0], max_tilt_deg=12,
                       max_index=5, component="exx", axes=axes,
                       frame_description="sample: x along [1 1 0], z along [0 0 1]")
best = plan.axes[0]
print(f"best axis for e'xx within 12 deg of [2 3 0]: [{' '.join(map(str, best.zone))}]")

position, intensity = laueline.read_profile(EXAMPLES / "profile.csv")
profile = laueline.detect_profile(position, intensity)
foil = laueline.thickness_from_fringes(profile.fringes, profile.separation, kv=200,
                                       d_spacing_A=1.9202, fringes_sigma=profile.fringes_sigma,
                                       separation_sigma=profile.separation_sigma)
print(f"foil thickness {foil.thickness_nm:.1f} +- {foil.thickness_sigma_nm:.1f} nm")
assert np.isfinite(foil.thickness_nm)
