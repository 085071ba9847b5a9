"""The demonstration: an invented device, calibrated and measured from images.

Scenario (invented for laueline; no real device or measurement): a test
structure has a silicon channel running along [1 1 0] between two
silicon-germanium stressor pads.  A TEM lamella is tilted to the Si [2 3 0]
zone axis.  Two patterns are recorded at a nominal 200 kV with the same
camera length: one in the substrate far below the channel (taken as
unstrained) and one in the channel centre.  The microscope's effective
voltage is 198.6 kV (the high-tension calibration is a little off, and the
effective value absorbs part of the dynamical line shifts in real data).
The channel is compressed along its length by the stressors, with the
lateral and vertical responses of a thin, partly relaxed lamella:

    sample frame x' = [1 1 0] (channel), z' = [0 0 1] (growth direction)
    e'xx = -3.0e-3, e'yy = +0.4e-3, e'zz = +1.2e-3, shears 0

The demo renders both patterns (as ``examples/make_demo.py`` does for the
files kept in the repository), finds their lines, calibrates the voltage
and camera scale on the reference, fits the strain of the channel from its
image with the calibration held, and prints strain and stress beside the
truth.
"""

from __future__ import annotations

import contextlib
from pathlib import Path

import numpy as np

__all__ = ["SCENARIO", "scenario_strain", "render_scenario", "run_demo"]

SCENARIO = {
    "structure": "Si",
    "zone": (2, 3, 0),
    "x_axis": (0, 0, 4),
    "nominal_kv": 200.0,
    "effective_kv": 198.6,
    "disk_mrad": 6.0,
    "rotation_deg": 23.0,
    "sample_x": (1, 1, 0),
    "sample_z": (0, 0, 1),
    "strain_sample": (-3.0e-3, 0.4e-3, 1.2e-3, 0.0, 0.0, 0.0),
    "elastic_GPa": (165.7, 63.9, 79.6),   # Si, Hopcroft et al. (2010), from memory
    "seeds": {"reference": 11, "channel": 12},
}


def scenario_strain(crystal):
    """The channel strain in the reference Cartesian frame (3x3)."""
    from .strain import from_voigt, sample_axes

    axes = sample_axes(crystal.basis, SCENARIO["sample_x"], SCENARIO["sample_z"])
    return axes.T @ from_voigt(SCENARIO["strain_sample"]) @ axes


#: Files the demonstration writes into its folder.
DEMO_FILES = ("reference.tif", "reference.truth.json", "channel.tif", "channel.truth.json",
              "calibration.json", "channel-fit.json", "channel-fit.png",
              "reference-detection.png")


def _scenario_files(folder):
    folder = Path(folder)
    return [folder / f"{name}{suffix}" for name in ("reference", "channel")
            for suffix in (".tif", ".truth.json")]


def _prepare_folder(folder):
    """Check ``folder`` can hold the outputs; create it if missing. Returns True if created."""
    from .errors import InputError

    folder = Path(folder)
    if folder.exists():
        if not folder.is_dir():
            raise InputError(f"{folder} exists and is not a folder; name a folder for the "
                             "demonstration's files")
        return False
    parent = folder.parent
    if not parent.is_dir():
        raise InputError(f"cannot create {folder}: folder {parent} does not exist")
    try:
        folder.mkdir()
    except OSError as exc:
        raise InputError(f"cannot create {folder}: {exc.strerror}") from None
    return True


def _remove_if_empty(folder):
    try:
        folder.rmdir()
    except OSError:  # not empty (files of an earlier run) or gone: leave it
        pass


def render_scenario(folder, force=False, plan=None):
    """Render the reference and channel patterns with their truth files into ``folder``.

    All four files are checked before rendering and named together at the
    end (see :mod:`laueline.io.outputs`).  With ``plan``, an active
    :class:`~laueline.io.outputs.OutputPlan` holding the files, they are
    only staged in it.

    Returns the paths of the two images.
    """
    from . import report
    from .crystal import read_crystal
    from .images.render import RenderSettings, render_pattern
    from .io.outputs import OutputPlan, write_image

    folder = Path(folder)
    own = plan is None
    created = False
    if own:
        created = _prepare_folder(folder)
        plan = OutputPlan(_scenario_files(folder), force=force)
    try:
        if own:
            plan.check()
        si = read_crystal(SCENARIO["structure"])
        paths = {}
        with contextlib.ExitStack() as stack:
            if own:
                stack.enter_context(plan.active())
            for name, strain in [("reference", None), ("channel", scenario_strain(si))]:
                settings = RenderSettings(rotation_deg=SCENARIO["rotation_deg"],
                                          seed=SCENARIO["seeds"][name])
                image, truth = render_pattern(si, SCENARIO["zone"], SCENARIO["effective_kv"],
                                              SCENARIO["disk_mrad"], settings, strain=strain,
                                              x_axis=SCENARIO["x_axis"])
                truth["scenario"] = {k: (list(v) if isinstance(v, tuple) else v)
                                     for k, v in SCENARIO.items() if k != "seeds"}
                truth["region"] = name
                path = folder / f"{name}.tif"
                truth["image"] = path.name
                write_image(path, image, force=force)
                report.write_json(truth, folder / f"{name}.truth.json", force=force)
                paths[name] = path
            if own:
                plan.commit()
    except BaseException:
        if created:
            _remove_if_empty(folder)
        raise
    return paths


def run_demo(out="laueline-demo", force=False, stream=None):
    """Run the whole demonstration, writing images, JSON and figures into ``out``.

    Every output is checked before any work starts and all are named
    together at the end; a failure or an interruption leaves none of them.

    Returns
    -------
    (calibration FitResult, channel FitResult)
    """
    out = Path(out)
    created = _prepare_folder(out)
    try:
        return _run_demo(out, force, stream)
    except BaseException:
        if created:
            _remove_if_empty(out)
        raise


def _run_demo(out, force, stream):
    import sys

    from .io.outputs import OutputPlan

    stream = stream or sys.stdout

    def say(text=""):
        print(text, file=stream)

    outputs = [out / n for n in DEMO_FILES]
    plan = OutputPlan(outputs, force=force)
    plan.check()
    with plan.active():
        cal, fit = _demo_steps(out, force, plan, say)
        plan.commit()
    say(f"   wrote {', '.join(p.name for p in outputs)} in {out}/")
    return cal, fit


def _demo_steps(out, force, plan, say):
    """Render, calibrate and fit, staging every file in ``plan``."""
    from . import report
    from .crystal import read_crystal
    from .images.detect import detect_lines
    from .images.io import read_image
    from .io.outputs import save_figure
    from .plot import detection_figure, fit_figure
    from .refine import CAUTIONS, refine_image
    from .strain import cubic_stiffness, sample_axes

    si = read_crystal(SCENARIO["structure"])
    say("laueline demo: an invented test structure (see laueline.demo)")
    say(f"  Si [2 3 0], nominal {SCENARIO['nominal_kv']:g} kV, disk "
        f"{SCENARIO['disk_mrad']:g} mrad; reference in the substrate, measurement in the "
        "channel")
    paths = render_scenario(out, force=force, plan=plan)
    say(f"  rendered {paths['reference'].name} and {paths['channel'].name} in {out}/")

    ref_image, sat = read_image(plan.staged_path(paths["reference"]))
    ref_det = detect_lines(ref_image, saturation=sat, source=str(paths["reference"]))
    save_figure(detection_figure(ref_det, ref_image), out / "reference-detection.png",
                force=force)
    cal = refine_image(si, SCENARIO["zone"], ref_det, kv=SCENARIO["nominal_kv"], model="fixed",
                       free=["kv"], x_axis=SCENARIO["x_axis"], disk_mrad=SCENARIO["disk_mrad"],
                       mirror=False)
    report.write_json(report.fit_document(cal, points_source=str(paths["reference"])),
                      out / "calibration.json", force=force)
    say("")
    say("1. calibration on the reference region (voltage and camera scale free)")
    say(f"   {len(ref_det.good_lines)} lines detected, rms {cal.rms_px:.3f} px")
    say(f"   effective voltage {cal.kv:.3f} +- {cal.kv_sigma:.3f} kV   "
        f"(truth {SCENARIO['effective_kv']:g})")
    scale_sigma = cal.detector_sigma["scale_px_per_mrad"]
    say(f"   camera scale {cal.detector.scale_px_per_mrad:.4f} +- {scale_sigma:.4f} px/mrad")

    image, sat = read_image(plan.staged_path(paths["channel"]))
    det = detect_lines(image, saturation=sat, source=str(paths["channel"]))
    axes = sample_axes(si.basis, SCENARIO["sample_x"], SCENARIO["sample_z"])
    stiffness = cubic_stiffness(*SCENARIO["elastic_GPa"])
    fit = refine_image(si, SCENARIO["zone"], det, calibration=(cal.kv, cal.detector),
                       x_axis=SCENARIO["x_axis"], stiffness=stiffness, sample_axes=axes)
    report.write_json(report.fit_document(fit, calibration_source=str(out / "calibration.json"),
                                          points_source=str(paths["channel"])),
                      out / "channel-fit.json", force=force)
    save_figure(fit_figure(fit, si, image=image), out / "channel-fit.png", force=force)

    from .strain import stress, voigt

    truth_sample = np.array(SCENARIO["strain_sample"])
    truth_stress = voigt(axes @ stress(scenario_strain(si), stiffness) @ axes.T)
    st = fit.strain
    fitted = voigt(st.sample_green_lagrange)
    fitted_sigma = voigt(st.sample_green_lagrange_sigma)
    s_fit, s_sig = voigt(st.sample_stress_GPa), voigt(st.sample_stress_sigma_GPa)
    say("")
    say("2. the channel (voltage and scale held from the calibration)")
    say(f"   {len(det.good_lines)} lines detected, {fit.n_used} fitted, rms {fit.rms_px:.3f} px")
    say("")
    say("   strain, sample frame x'=[110] z'=[001]   fitted              truth   (fit-truth)/sigma")
    for name, f, s, t in zip(("xx", "yy", "zz", "yz", "xz", "xy"), fitted, fitted_sigma,
                             truth_sample):
        say(f"     e{name}  {f:+.2e} +- {s:.1e}   {t:+.2e}   {((f - t) / s):+5.1f}")
    say("")
    say("   stress (GPa), sample frame               fitted              truth")
    for name, f, s, t in zip(("xx", "yy", "zz", "yz", "xz", "xy"), s_fit, s_sig, truth_stress):
        say(f"     s{name}  {f:+.3f} +- {s:.3f}      {t:+.3f}")
    say("")
    say("   The truth is small-strain; the fit reports the Green-Lagrange tensor, which")
    say(f"   differs at second order (~{max(abs(truth_sample)) ** 2 / 2:.0e} here).")
    for w in fit.warnings:
        say(f"   warning: {w}")
    for c in CAUTIONS:
        say(f"   caution: {c}")
    say("")
    return cal, fit
