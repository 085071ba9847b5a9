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

__all__ = ["SCENARIO", "scenario_strain", "render_scenario", "scenario_points",
           "write_scenario_points", "run_demo"]

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
              "reference.csv", "channel.csv", "calibration.json", "channel-fit.json",
              "channel-fit.png", "reference-detection.png", "line-scan.npy", "line-scan.png")


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


def scenario_points(truth, n=30, noise_px=0.25, seed=0):
    """Crossings of a rendered scenario pattern as a person would digitise them.

    The ``n`` crossings of strong lines meeting at 25 deg or more, inside 90 %
    of the disk radius, from the truth document of :func:`render_scenario`,
    with Gaussian pointing noise of ``noise_px`` and a 0.1 px reading
    resolution.  Returns (xy_px, hkl_a, hkl_b).
    """
    strength = {tuple(ln["hkl"]): ln["strength"] for ln in truth["lines"]}
    centre = np.asarray(truth["detector"]["center_px"])
    rows = [c for c in truth["crossings"] if c["angle_deg"] >= 25.0
            and np.hypot(*(np.asarray(c["xy_px"]) - centre)) < 0.9 * truth["disk_radius_px"]]
    rows.sort(key=lambda c: -min(strength[tuple(c["hkl_a"])], strength[tuple(c["hkl_b"])]))
    rows = rows[:n]
    xy = np.array([c["xy_px"] for c in rows])
    xy = np.round(xy + np.random.default_rng(seed).normal(0.0, noise_px, xy.shape), 1)
    return (xy, np.array([c["hkl_a"] for c in rows]), np.array([c["hkl_b"] for c in rows]))


def write_scenario_points(folder, force=False, plan=None):
    """Write ``reference.csv`` and ``channel.csv``, digitised crossings of both patterns.

    Needs the truth files of :func:`render_scenario` in ``folder`` (staged in
    ``plan``, an active :class:`laueline.io.outputs.OutputPlan`, if given).
    """
    from . import report
    from .points import write_points

    folder = Path(folder)
    paths = {}
    for name in ("reference", "channel"):
        truth_path = folder / f"{name}.truth.json"
        if plan is not None:
            truth_path = plan.staged_path(truth_path)
        truth = report.read_json(truth_path, "laueline.truth")
        xy, hkl_a, hkl_b = scenario_points(truth, seed=SCENARIO["seeds"][name])
        paths[name] = folder / f"{name}.csv"
        write_points(paths[name], xy, hkl_a, hkl_b, force=force)
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
    store = out / "line-scan.zarr"
    if store.exists() and not force:
        from .errors import InputError

        raise InputError(f"{store} exists; pass --force to overwrite it")
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
    from .fit import CAUTIONS, refine_image
    from .strain import cubic_stiffness, sample_axes

    si = read_crystal(SCENARIO["structure"])
    say("laueline demo: an invented test structure (described in examples/README.md)")
    say(f"  Si [2 3 0], nominal {SCENARIO['nominal_kv']:g} kV, disk "
        f"{SCENARIO['disk_mrad']:g} mrad; reference in the substrate, measurement in the "
        "channel")
    paths = render_scenario(out, force=force, plan=plan)
    points = write_scenario_points(out, force=force, plan=plan)
    say(f"  rendered {paths['reference'].name} and {paths['channel'].name} in {out}/, with "
        f"their crossings digitised by hand in {points['reference'].name} and "
        f"{points['channel'].name}")

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
    fit = refine_image(si, SCENARIO["zone"], det, calibration=cal.calibration(),
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
    say("   strain in the sample frame x' = [1 1 0], z' = [0 0 1]")
    say("          fitted                  truth   (fit - truth) / sigma")
    for name, f, s, t in zip(("xx", "yy", "zz", "yz", "xz", "xy"), fitted, fitted_sigma,
                             truth_sample):
        say(f"     e{name}  {f:+.2e} +- {s:.1e}   {t:+.2e}   {((f - t) / s):+5.1f}")
    say("")
    say("   stress in the sample frame (GPa)")
    say("          fitted            truth")
    for name, f, s, t in zip(("xx", "yy", "zz", "yz", "xz", "xy"), s_fit, s_sig, truth_stress):
        say(f"     s{name}  {f:+.3f} +- {s:.3f}   {round(t, 3) + 0.0:+.3f}")  # no -0.000
    say("")
    say("   The truth is small-strain; the fit reports the Green-Lagrange tensor, which")
    say(f"   differs at second order (~{max(abs(truth_sample)) ** 2 / 2:.0e} here).")
    for w in fit.warnings:
        say(f"   warning: {w}")
    for c in CAUTIONS:
        say(f"   caution: {c}")
    run_line_scan(out, si, cal.calibration(), ref_image, say, force=force)
    say("")
    return cal, fit


#: The line scan across the channel (invented): positions along x' in nm, the
#: channel between -40 and +40 nm, its strain falling off over ~15 nm outside.
LINE_SCAN = {"step_nm": 10.0, "n": 15, "channel_half_width_nm": 40.0, "edge_nm": 15.0,
             "seed": 40}


def line_scan_strain(position_nm):
    """Sample-frame strain (n, 6) along the line scan: the channel value inside."""
    x = np.abs(np.asarray(position_nm, float))
    inside = 0.5 * (1.0 - np.tanh((x - LINE_SCAN["channel_half_width_nm"])
                                  / LINE_SCAN["edge_nm"]))
    return inside[:, None] * np.asarray(SCENARIO["strain_sample"])[None, :]


def render_line_scan(crystal, detector_settings=None):
    """The line scan's patterns (n, 512, 512) and positions (nm), rendered."""
    from .images.render import RenderSettings, render_pattern
    from .strain import from_voigt, sample_axes

    n = LINE_SCAN["n"]
    position = (np.arange(n) - (n - 1) / 2) * LINE_SCAN["step_nm"]
    axes = sample_axes(crystal.basis, SCENARIO["sample_x"], SCENARIO["sample_z"])
    images = []
    for k, sample in enumerate(line_scan_strain(position)):
        settings = RenderSettings(rotation_deg=SCENARIO["rotation_deg"],
                                  seed=LINE_SCAN["seed"] + k, **(detector_settings or {}))
        image, _ = render_pattern(crystal, SCENARIO["zone"], SCENARIO["effective_kv"],
                                  SCENARIO["disk_mrad"], settings,
                                  strain=axes.T @ from_voigt(sample) @ axes,
                                  x_axis=SCENARIO["x_axis"])
        images.append(image.astype(np.float32))
    return np.stack(images), position


def run_line_scan(out, crystal, calibration, reference_image, say, force=False):
    """Map the strain along the line scan with the calibration held; figure and store."""
    from .maps import map_strain, plan_scan, scan_from_array
    from .plot import map_figure, save_figure
    from .strain import sample_axes

    images, position = render_line_scan(crystal)
    axes = sample_axes(crystal.basis, SCENARIO["sample_x"], SCENARIO["sample_z"])
    plan = plan_scan(crystal, SCENARIO["zone"], calibration, images.shape[1:],
                     disk_mrad=SCENARIO["disk_mrad"], x_axis=SCENARIO["x_axis"],
                     sample_axes=axes, reference=reference_image)
    from .io.outputs import atomic_write

    counts = np.round(images).astype(np.uint16)  # the detector's counts, as a file holds them
    atomic_write(Path(out) / "line-scan.npy", lambda tmp: np.save(tmp, counts), force=force)
    scan = scan_from_array(counts, step_nm=LINE_SCAN["step_nm"], source="demo line scan",
                           chunk_patterns=5)
    scan.nav_coords["scan"] = (position, "nm")
    ds = map_strain(scan, plan, out=Path(out) / "line-scan.zarr", force=force, progress=False)
    save_figure(map_figure(ds), Path(out) / "line-scan.png", force=force)
    truth = line_scan_strain(position)
    value = np.asarray(ds["sample_exx"].values)
    sigma = np.asarray(ds["sigma_sample_exx"].values)
    say("")
    say(f"3. a line scan across the channel: {len(position)} patterns, "
        f"{LINE_SCAN['step_nm']:g} nm apart, calibration held, relative to the reference")
    say("   x' (nm)   e'xx fitted           truth")
    for x, v, s, t in zip(position, value, sigma, truth[:, 0]):
        say(f"   {x:+7.0f}   {v:+.2e} +- {s:.1e}   {t:+.2e}")
    return ds
