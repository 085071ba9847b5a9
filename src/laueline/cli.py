"""Command line: ``laueline COMMAND ...``.

A thin shell: it parses arguments, calls the library, prints text and writes
files.  Errors the user can cause end with one line on stderr and exit
status 2; a fit that runs but does not converge exits with status 3.
"""

from __future__ import annotations

import argparse
import re
import sys

from .errors import FitError, InputError

EXIT_INPUT = 2
EXIT_NOT_CONVERGED = 3


class _Parser(argparse.ArgumentParser):
    """Argument errors as a single line, exit status 2; -5e-4 is a number, not an option."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._negative_number_matcher = re.compile(r"^-(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?$")

    def error(self, message):
        sys.stderr.write(f"laueline: error: {message} (see '{self.prog} --help')\n")
        sys.exit(EXIT_INPUT)


class _Choices:
    """Choices of an option read from a library module when first needed.

    Building the parser then imports no fit or survey code: a ``predict``
    run does not pay for modules it never uses.  Give the option a metavar
    (argparse would otherwise list the choices while building the parser);
    ``%(choices)s`` in the help lists them when help is asked for.
    """

    def __init__(self, module, name):
        self._module, self._name = module, name

    def _values(self):
        from importlib import import_module

        return getattr(import_module(self._module, __package__), self._name)

    def __contains__(self, value):
        return value in self._values()

    def __iter__(self):
        return iter(self._values())


def _add_block_option(p):
    p.add_argument("--block", metavar="NAME",
                   help="the CIF data block to read (data_NAME), when the file holds several")


def _add_crystal_options(p):
    p.add_argument("structure", help="CIF file or bundled structure name (see 'laueline structures')")
    _add_block_option(p)
    p.add_argument("--zone", nargs=3, type=int, required=True, metavar=("U", "V", "W"),
                   help="zone axis [u v w], pointing toward the source")
    p.add_argument("--kv", type=float, default=200.0, help="accelerating voltage in kV (200)")
    p.add_argument("--x-axis", nargs=3, type=int, metavar=("H", "K", "L"),
                   help="reflection fixing the disk x direction (default: shortest visible "
                        "zero-layer reflection)")
    p.add_argument("--b-iso", type=float, metavar="B",
                   help="one isotropic B in A^2 for all atoms (a cooled specimen sharpens lines)")
    p.add_argument("--inner-potential", action="store_true",
                   help="correct the wave number for the mean inner potential")


def _add_output_options(p, csv=False):
    p.add_argument("--json", metavar="PATH", help="write the JSON document here")
    if csv:
        p.add_argument("--csv", metavar="PATH",
                       help="write the line table here and the crossing table beside it")
    p.add_argument("--figure", metavar="PATH", help="write a figure (.png, .svg or .pdf)")
    p.add_argument("--force", action="store_true", help="overwrite existing output files")


def _finish(args, document=None, figure=None, extra=()):
    """Write the JSON document and the figure asked for, then say what was written.

    ``figure`` is a callable returning a matplotlib figure, so that matplotlib
    is imported only when a figure is asked for.
    """
    from . import report

    if args.json and document is not None:
        report.write_json(document, args.json, args.force)
    if getattr(args, "figure", None) and figure is not None:
        from .plot import save_figure

        save_figure(figure(), args.figure, force=args.force)
    written = [p for p in (getattr(args, "json", None), *extra, getattr(args, "figure", None))
               if p]
    if written:
        print("\nwrote " + ", ".join(str(p) for p in written))


def _load_crystal(args):
    from .crystal import read_crystal

    crystal = read_crystal(args.structure, block=getattr(args, "block", None))
    if getattr(args, "b_iso", None) is not None:
        crystal = crystal.with_b_iso(args.b_iso)
    return crystal


def _csv_pair(path):
    from pathlib import Path

    path = Path(path)
    return path, path.with_name(path.stem + "-crossings" + (path.suffix or ".csv"))


# ---------------------------------------------------------------------------
# commands
# ---------------------------------------------------------------------------

def _cmd_predict(args):
    from . import report
    from .lines import predict

    csv_paths = _csv_pair(args.csv) if args.csv else (None, None)
    _check_dynamical_options(args)
    report.check_outputs([args.json, *csv_paths], args.force, args.figure)
    crystal = _load_crystal(args)
    if args.cell is not None:
        crystal = crystal.with_cell(*args.cell)
    pattern = predict(crystal, args.zone, args.kv, args.disk_mrad, x_axis=args.x_axis,
                      gmax=args.gmax, min_strength=args.min_strength,
                      min_angle_deg=args.min_angle_deg, strain=args.strain,
                      inner_potential=args.inner_potential)
    print(report.pattern_text(pattern))
    dynamical = None
    if args.dynamical:
        from .dynamical import dynamical_lines

        dynamical = dynamical_lines(pattern, args.thickness_nm,
                                    absorption_ratio=args.absorption_ratio)
        print(report.dynamical_text(pattern, dynamical))
    if args.csv:
        (lh, lr), (ch, cr) = report.pattern_tables(pattern)
        report.write_csv(csv_paths[0], lh, lr, args.force)
        report.write_csv(csv_paths[1], ch, cr, args.force)

    def figure():
        from .plot import pattern_figure

        disk_image = None
        if dynamical is not None:
            from .dynamical import disk_intensity_grid

            disk_image = disk_intensity_grid(pattern, args.thickness_nm,
                                             absorption_ratio=args.absorption_ratio)
        return pattern_figure(pattern, show_crossings=args.mark_crossings,
                              disk_image=disk_image)

    _finish(args, report.pattern_document(pattern, dynamical), figure, extra=csv_paths)
    return 0


def _check_dynamical_options(args):
    """--dynamical needs a thickness; the thickness and absorption must be physical.

    The thickness is a number of nm or the JSON document ``laueline thickness``
    writes (its thickness and, unless --thickness-sigma-nm is given, its sigma).
    """
    sigma_given = getattr(args, "thickness_sigma_nm", None) is not None
    if not args.dynamical:
        if args.thickness_nm is not None or args.absorption_ratio is not None or sigma_given:
            raise InputError("--thickness-nm, --thickness-sigma-nm and --absorption-ratio "
                             "apply with --dynamical")
        return
    from .dynamical import DEFAULT_ABSORPTION_RATIO, check_absorption_ratio, check_thickness

    if args.thickness_nm is None:
        raise InputError("--dynamical needs the foil thickness: give --thickness-nm")
    try:
        value = float(args.thickness_nm)
    except ValueError:
        from . import report
        from .dynamical import thickness_from_document

        value, sigma = thickness_from_document(
            report.read_json(args.thickness_nm, "laueline.thickness"))
        if hasattr(args, "thickness_sigma_nm") and not sigma_given:
            args.thickness_sigma_nm = sigma
    args.thickness_nm = check_thickness(value, "--thickness-nm")
    if args.absorption_ratio is None:
        args.absorption_ratio = DEFAULT_ABSORPTION_RATIO
    args.absorption_ratio = check_absorption_ratio(args.absorption_ratio, "--absorption-ratio")


def _add_dynamical_options(p):
    p.add_argument("--dynamical", action="store_true",
                   help="compute the lines with Bloch waves (needs --thickness-nm)")
    p.add_argument("--thickness-nm", metavar="T",
                   help="foil thickness in nm, (0, 2000], for --dynamical; or the JSON "
                        "that 'laueline thickness' wrote")
    p.add_argument("--absorption-ratio", type=float, metavar="A",
                   help="absorptive to elastic potential ratio in [0, 1) (0.1)")


def _add_sample_frame_options(p):
    p.add_argument("--sample-x", nargs=3, type=float, metavar=("U", "V", "W"),
                   help="crystal direction of the sample x axis (e.g. a channel direction)")
    p.add_argument("--sample-z", nargs=3, type=float, metavar=("U", "V", "W"),
                   help="crystal direction of the sample z axis (e.g. the growth direction)")


def _sample_frame(args, crystal):
    """(axes, description) of the sample frame asked for, or (None, 'reference-cartesian').

    The two directions must be normal to each other in the crystal: a frame
    is never made orthogonal behind the user's back.
    """
    import numpy as np

    from .strain import sample_axes

    if (args.sample_x is None) != (args.sample_z is None):
        raise InputError("a sample frame needs both --sample-x and --sample-z")
    if args.sample_x is None:
        return None, "reference-cartesian"
    x = crystal.basis @ np.asarray(args.sample_x, dtype=float)
    z = crystal.basis @ np.asarray(args.sample_z, dtype=float)
    if not (np.linalg.norm(x) > 0 and np.linalg.norm(z) > 0):
        raise InputError("--sample-x and --sample-z must be non-zero directions")
    cos = float(x @ z / (np.linalg.norm(x) * np.linalg.norm(z)))
    if abs(cos) > 1e-6:  # direction indices are exact; this only absorbs rounding
        raise InputError(
            f"--sample-x [{' '.join(f'{v:g}' for v in args.sample_x)}] is not normal to "
            f"--sample-z [{' '.join(f'{v:g}' for v in args.sample_z)}] (angle "
            f"{np.degrees(np.arccos(np.clip(cos, -1, 1))):.2f} deg); give normal directions")
    return (sample_axes(crystal.basis, args.sample_x, args.sample_z),
            f"sample: x along [{' '.join(f'{v:g}' for v in args.sample_x)}], "
            f"z along [{' '.join(f'{v:g}' for v in args.sample_z)}]")


def _stiffness_and_axes(args, crystal):
    from .strain import cubic_stiffness, read_stiffness

    stiffness = None
    if args.cubic_elastic_gpa is not None:
        stiffness = cubic_stiffness(*args.cubic_elastic_gpa)
    elif args.stiffness_gpa is not None:
        stiffness = read_stiffness(args.stiffness_gpa)
    return stiffness, _sample_frame(args, crystal)[0]


# library parameter names -> the refine command's options, for error messages
_REFINE_OPTIONS = {
    "scale_px_per_mrad": "--scale-px-per-mrad", "hold_strain": "--fix-strain",
    "zero_normal_stress": "--zero-normal-stress", "foil_normal": "--foil-normal",
    "sample_axes": "--sample-x/--sample-z", "stiffness": "--cubic-elastic-GPa or --stiffness-GPa",
    "exclude_lines": "--exclude-lines", "x_axis": "--x-axis", "unique_axis": "--unique-axis",
    "disk_mrad": "--disk-mrad", "match_mrad": "--match-mrad", "biaxial": "--biaxial",
    "tilt_deg": "tilt_deg", "model='fixed', free=['kv']": "--model fixed --free kv",
    "calibration": "--calibration", "hold": "--hold", "free": "--free",
    "line_sigma_px": "--line-sigma-px",
    "a calibration": "--calibration", "(stiffness)": "(--cubic-elastic-GPa or --stiffness-GPa)",
}


def _refine_message(text):
    """Python parameter names in a library message -> the command's options.

    Names with an underscore or '=' are replaced anywhere; plain words only
    where they label the message (followed by a colon).
    """
    for name, option in _REFINE_OPTIONS.items():
        plain_word = name.isidentifier() and "_" not in name
        tail = r"(?=:)" if plain_word else r"(?![\w-])"
        text = re.sub(rf"(?<![\w-]){re.escape(name)}{tail}", option, text)
    return text


def _group_indices(values, hexagonal, option):
    size = 4 if hexagonal else 3
    if len(values) % size:
        raise InputError(f"{option}: give indices in groups of {size}"
                         + (" (four-index for a hexagonal crystal)" if hexagonal else ""))
    return [tuple(values[i:i + size]) for i in range(0, len(values), size)]


def _line_shape_note(image, detection, result, most=16):
    """Split or broadened lines: one strain per pattern averages through the foil.

    Only the lines the fit used are profiled, at most ``most`` of the
    clearest (by signal-to-noise), which keeps the check to a few tenths of
    a second: a foil that relaxes splits or broadens most of its lines.
    """
    from dataclasses import replace

    from .relaxation import assess_line_profiles, line_shape_warning

    used = [ln.index for ln in (result.lines or []) if ln.used]
    keep = set(sorted(used, key=lambda i: -detection.lines[i].snr)[:most])
    lines = [ln if i in keep else replace(ln, flag=ln.flag or "not profiled")
             for i, ln in enumerate(detection.lines)]
    return line_shape_warning(assess_line_profiles(image, replace(detection, lines=lines)))


def _cmd_refine(args):
    import dataclasses

    from . import report
    from .fit import Calibration, PatternSpec, PixelFrame, is_hexagonal, refine_patterns
    from .fit.patterns import read_patterns
    from .points import read_points

    _check_dynamical_options(args)
    report.check_outputs([args.json], args.force, args.figure)
    crystal = _load_crystal(args)
    given = [o for o, v in (("--points", args.points), ("--image", args.image),
                            ("--patterns", args.patterns)) if v is not None]
    if len(given) != 1:
        raise InputError("give one of --points CSV, --image PATTERN or --patterns LIST.json")
    if args.patterns is None and args.zone is None:
        raise InputError("--zone is needed with --points or --image")
    if args.patterns is not None and args.zone is not None:
        raise InputError("with --patterns the zone axes come from the patterns file; "
                         "leave out --zone")
    hexagonal = is_hexagonal(crystal.cell)
    stiffness, axes = _stiffness_and_axes(args, crystal)
    hold_strain = {}
    for item in args.fix_strain or ():
        name, _, value = item.partition("=")
        try:
            hold_strain[name.strip()] = float(value) if value else 0.0
        except ValueError:
            raise InputError(f"--fix-strain {item}: write NAME or NAME=VALUE, e.g. exz=0") \
                from None
    options = dict(
        kv=200.0 if args.kv is None else args.kv, model=args.model, free=args.free or (),
        hold=args.hold or (),
        unique_axis=args.unique_axis, robust=args.robust, inner_potential=args.inner_potential,
        stiffness=stiffness, sample_axes=axes, hold_strain=hold_strain or None,
        biaxial=args.biaxial, zero_normal_stress=args.zero_normal_stress,
        foil_normal=args.foil_normal,
        exclude_lines=_group_indices(args.exclude_lines or [], hexagonal, "--exclude-lines"),
        tilt_tolerance_deg=args.tilt_tolerance_deg, line_sigma_px=args.line_sigma_px)
    calibration = None
    if args.calibration:
        calibration = Calibration.from_document(
            report.read_json(args.calibration, "laueline.fit"), source=args.calibration)
    frame = PixelFrame(args.y_up)
    defaults = dict(x_axis=args.x_axis, calibration=calibration,
                    center_px=args.center_px, scale_px_per_mrad=args.scale_px_per_mrad,
                    rotation_deg=args.rotation_deg, mirror=args.mirror,
                    min_strength=args.min_strength, min_angle_deg=args.min_angle_deg,
                    match_mrad=args.match_mrad, disk_mrad=args.disk_mrad)
    image = read_meta = distortion = None
    distortion_mode = None
    try:
        if args.patterns:
            pattern_defaults = {k: v for k, v in defaults.items()
                                if v is not None and k != "x_axis"}
            specs = read_patterns(args.patterns, defaults=pattern_defaults,
                                  detect_options={"min_angle_deg": args.min_angle_deg})
        elif args.image:
            from .images.detect import detect_lines

            if args.y_up:
                raise InputError("--y-up applies to point files; images are read row by row")
            read = _read_pattern_args(args, args.image)
            image, saturation, read_meta = read.image, read.saturation, read.metadata
            # the file's voltage and camera scale unless the command line gives them
            if args.kv is None and read.metadata.kv is not None:
                options["kv"] = read.metadata.kv
            if defaults["scale_px_per_mrad"] is None and calibration is None:
                defaults["scale_px_per_mrad"] = read.metadata.scale_px_per_mrad
            print(read.metadata.text() + "\n")
            detection = detect_lines(image, disk=args.disk_px, saturation=saturation,
                                     min_angle_deg=args.min_angle_deg, source=args.image)
            distortion_mode = _distortion_mode(args, detection, calibration, options)
            if distortion_mode in ("free", "test"):
                defaults["distortion"] = detection.disk.detector_distortion
            elif distortion_mode in ("zero", "held at zero"):
                defaults["distortion"] = (0.0, 0.0)
            specs = [PatternSpec(tuple(args.zone), detection=detection, source=args.image,
                                 **defaults)]
        else:
            points = read_points(args.points, y_up=args.y_up)
            specs = [PatternSpec(tuple(args.zone), points=points, pixel_frame=frame,
                                 source=args.points, **defaults)]
        dynamical = None
        if args.dynamical:
            if len(specs) != 1:
                raise InputError("--dynamical corrects the fit of one pattern; give --points or "
                                 "--image, not --patterns")
            from .dynamical import refine_dynamical

            spec = specs[0]
            observations = spec.detection if spec.detection is not None else spec.points
            single = {k: v for k, v in defaults.items() if v is not None}
            if spec.detection is None:
                single["pixel_frame"] = frame
            # a calibration made with --dynamical carries how its voltage and scale
            # move with the thickness and absorption: the same foil's variations
            changes = None
            if args.calibration:
                changes = (report.read_json(args.calibration, "laueline.fit").get("dynamical")
                           or {}).get("calibration_changes")
            dynamical = refine_dynamical(crystal, tuple(args.zone), observations,
                                         thickness_nm=args.thickness_nm,
                                         thickness_sigma_nm=args.thickness_sigma_nm,
                                         absorption_ratio=args.absorption_ratio,
                                         calibration_changes=changes, **single, **options)
            result = dynamical.result
        else:
            if distortion_mode == "test":
                try:
                    result = refine_patterns(crystal, specs, **options)
                except InputError:
                    # too few lines to separate the distortion from the rest: the
                    # disk outline's value is held instead
                    distortion_mode = "disk"
                    options["free"] = [f for f in options["free"] if f != "distortion"]
            if distortion_mode != "test":
                result = refine_patterns(crystal, specs, **options)
            else:
                estimate = _distortion_estimate(result, specs[0].detection, None, "test")
                if not estimate.significant:
                    distortion = estimate  # reported as measured, held at zero
                    # the data show no distortion: the plain similarity, fitted again
                    options["free"] = [f for f in options["free"] if f != "distortion"]
                    specs = [dataclasses.replace(specs[0], distortion=(0.0, 0.0))]
                    result = refine_patterns(crystal, specs, **options)
            bias = _kinematic_bias(result, crystal)
            if bias is not None:
                # the fit again, with the kinematic model's bias as its systematic part
                result = refine_patterns(crystal, specs, **options,
                                         systematic_covariance=bias.covariance_voigt)
                result.warnings.append(f"kinematic-bias estimate ({bias.method}): "
                                       f"{bias.note}; it is the systematic part of the "
                                       "strain's total uncertainty (--dynamical corrects "
                                       "the shifts instead)")
    except InputError as exc:
        raise InputError(_refine_message(str(exc))) from None
    if image is not None:
        note = _line_shape_note(image, specs[0].detection, result)
        if note is not None:
            result.warnings.append(note)
        if distortion is None:
            distortion = _distortion_estimate(result, specs[0].detection, calibration,
                                              distortion_mode)
        if not distortion.consistent:
            result.warnings.append("the projector distortion of the disk outline disagrees "
                                   "with the " + ("calibration's" if calibration is not None
                                                  else "line fit's")
                                   + ": check the disk edge and the calibration")
        elif calibration is not None and calibration.distortion_covariance is None \
                and specs[0].detection.disk.distortion_significant \
                and not any(calibration.detector.distortion):
            result.warnings.append("the disk outline shows a projector distortion that the "
                                   "calibration does not hold: make the calibration on an "
                                   "image (refine --image) so that it is measured")
    print(report.fit_text(result))
    if distortion is not None:
        print("\n" + distortion.text())
    if dynamical is not None:
        from .dynamical import dynamical_fit_text

        print(dynamical_fit_text(dynamical))

    def figure():
        from .plot import fit_figure

        return fit_figure(result, crystal, image=image)

    document = report.fit_document(result)
    if read_meta is not None:
        document["file"] = report._clean(read_meta.as_dict())
    if distortion is not None:
        document["distortion"] = report._clean(distortion.to_dict())
    if dynamical is not None:
        from .dynamical import dynamical_fit_document

        document = dynamical_fit_document(document, dynamical,
                                          report.fit_document(dynamical.kinematic))
    _finish(args, document, figure)
    if not result.converged_fit:
        sys.stderr.write(f"laueline: the fit did not converge: {result.message}\n")
        return EXIT_NOT_CONVERGED
    if not result.plausible:
        sys.stderr.write(f"laueline: the fit is implausible: {result.implausibility}\n")
        return EXIT_NOT_CONVERGED
    if dynamical is not None and not dynamical.settled:
        sys.stderr.write("laueline: the dynamical correction did not settle; the strain "
                         "kept changing by more than a tenth of its sigma\n")
        return EXIT_NOT_CONVERGED
    return 0


def _distortion_mode(args, detection, calibration, options):
    """How a fit to an image treats the projector distortion.

    ``"calibration"``: held at the calibration's value; ``"free"``: freed by
    ``--free distortion``, starting from the disk outline's; ``"zero"``: held
    at zero by ``--hold distortion`` or because the disk outline shows none;
    ``"test"``: the disk outline shows one, so the line fit frees it and a
    significance test on both measurements decides whether it is kept.
    """
    free, hold = set(options["free"]), set(options["hold"])
    if "distortion" in hold:
        return "held at zero" if calibration is None else "calibration"
    if calibration is not None and "distortion" not in free:
        return "calibration"
    if "distortion" in free:
        return "free" if calibration is None else "calibration-free"
    if detection.disk.distortion_significant:
        options["free"] = list(options["free"]) + ["distortion"]
        return "test"
    return "zero"


def _distortion_estimate(result, detection, calibration, mode):
    """The distortion measurements of an image fit, combined, with what is held."""
    import numpy as np

    from .fit.calibration import DistortionMeasurement, combine_distortion

    disk = DistortionMeasurement.from_disk(detection.disk)
    line_fit = DistortionMeasurement.from_fit(result)
    held = tuple(result.detector.distortion)
    if mode in ("calibration", "calibration-free") and calibration is not None:
        cov = calibration.distortion_covariance
        reference = None if cov is None else DistortionMeasurement(
            "calibration", tuple(calibration.detector.distortion), np.asarray(cov))
        return combine_distortion([reference, disk, line_fit], used=held,
                                  note="freed in this fit (--free distortion)"
                                  if line_fit is not None else "held from the calibration")
    if line_fit is None:
        return combine_distortion([disk], used=held, note=(
            "held at zero (--hold distortion)" if mode == "held at zero" else
            "the line fit cannot separate it from the other parameters: the disk "
            "outline's value is held" if mode == "disk" else
            "the disk outline shows none at the 99 % level: plain similarity"))
    if mode == "free":
        return combine_distortion([disk, line_fit], used=held,
                                  note="freed in the line fit (--free distortion)")
    estimate = combine_distortion([disk, line_fit])
    if estimate.significant:
        return combine_distortion([disk, line_fit], used=held,
                                  note="significant at the 99 % level: the line fit's value "
                                       "is held (fitted with the voltage and scale)")
    return estimate


def _cmd_thickness(args):
    from . import report
    from .thickness import detect_profile, read_profile, thickness_from_fringes

    report.check_outputs([args.json], args.force, args.figure)
    if args.dynamical:
        return _cmd_thickness_fit(args)
    crystal = None
    if args.d_spacing_A is None:
        if args.structure is None or args.hkl is None:
            raise InputError("give a structure with --hkl H K L, or --d-spacing-A")
        crystal = _load_crystal(args)
    elif args.hkl is not None and args.structure is not None:
        crystal = _load_crystal(args)
    detection = None
    if args.profile:
        if args.fringes_px or args.separation_px:
            raise InputError("give either --profile or --separation-px with --fringes-px")
        detection = detect_profile(*read_profile(args.profile))
        fringes, separation = detection.fringes, detection.separation
        fringes_sigma, separation_sigma = detection.fringes_sigma, detection.separation_sigma
    else:
        if args.fringes_px is None or args.separation_px is None:
            raise InputError("give --separation-px and --fringes-px (or --profile)")
        fringes, separation = args.fringes_px, args.separation_px
        fringes_sigma = separation_sigma = args.position_sigma_px
    result = thickness_from_fringes(
        fringes, separation, kv=args.kv,
        d_spacing_A=args.d_spacing_A if crystal is None else None,
        crystal=crystal, hkl=args.hkl, fringes_sigma=fringes_sigma,
        separation_sigma=separation_sigma, first_fringe_index=args.first_index)
    if detection is not None:
        result.profile = detection
        result.warnings = detection.warnings + result.warnings
    print(report.thickness_text(result))

    def figure():
        from .plot import thickness_figure

        return thickness_figure(result)

    _finish(args, report.thickness_document(
        result, crystal.summary() if crystal is not None else None), figure)
    return 0


def _kinematic_bias(result, crystal):
    """The kinematic-bias estimate of a strain fit (laueline.dynamical), or None.

    The engine's shifts when they take under two seconds, else the documented
    floor; None for fits without a strain (a calibration) or that failed.
    """
    import numpy as np

    from .dynamical import KINEMATIC_BIAS_FLOOR, KinematicBias, kinematic_bias

    if result.model == "fixed" or result.strain_covariance is None or not result.converged_fit or \
            not np.all(np.isfinite(result.strain_covariance)):
        return None
    if len(result.patterns) == 1:
        return kinematic_bias(result, crystal, max_seconds=2.0)
    level = KINEMATIC_BIAS_FLOOR["calibrated"]
    return KinematicBias(np.eye(6) * level ** 2, np.full(6, level), "floor", 200.0,
                         f"conservative floor {level:.0e} per component for a joint fit")


def _cmd_relaxation(args):
    from . import report
    from .images.io import read_image
    from .fit import Calibration
    from .relaxation import read_displacement_table, relaxation, relaxation_text

    report.check_outputs([args.json], args.force, args.figure)
    crystal = _load_crystal(args)
    table = None
    model = args.model or "cosh"
    if args.displacement_table:
        table = read_displacement_table(args.displacement_table, args.thickness_nm)
        model = "table"
    calibration = Calibration.from_document(report.read_json(args.calibration, "laueline.fit"),
                                            source=args.calibration)
    image, _ = read_image(args.image)
    result = relaxation(crystal, args.zone, image, calibration=calibration,
                        thickness_nm=args.thickness_nm, model=model, table=table,
                        x_axis=args.x_axis, min_strength=args.profile_min_strength,
                        half_width_px=args.half_width_px, segments=args.segments,
                        instrument_sigma_px=args.instrument_sigma_px, disk_px=args.disk_px)
    print(relaxation_text(result))

    def figure():
        from .plot import relaxation_figure

        return relaxation_figure(result)

    document = result.to_dict()
    document.update(image=str(args.image), calibration=str(args.calibration))
    _finish(args, document, figure)
    if not result.success:
        sys.stderr.write(f"laueline: {result.fit.message}\n")
        return EXIT_NOT_CONVERGED
    return 0


def _cmd_thickness_fit(args):
    """``thickness --profile CSV --dynamical``: the many-beam fit of the whole profile."""
    from . import report
    from .thickness import fit_profile, read_profile

    if not args.profile:
        raise InputError("--dynamical fits an intensity profile: give --profile CSV")
    if args.fringes_px or args.separation_px or args.first_index:
        raise InputError("--dynamical uses the profile alone: drop --fringes-px, "
                         "--separation-px and --first-index")
    if args.structure is None or args.hkl is None:
        raise InputError("--dynamical needs the structure and the reflection (--hkl H K L) "
                         "for the Bloch-wave intensities")
    crystal = _load_crystal(args)
    position, intensity = read_profile(args.profile)
    result = fit_profile(position, intensity, crystal, args.hkl, kv=args.kv,
                         n_beams=args.row_beams, absorption_ratio=args.absorption_ratio,
                         fit_absorption=not args.hold_absorption,
                         thickness_range_nm=args.thickness_range_nm)
    print(report.thickness_fit_text(result))

    def figure():
        from .plot import thickness_fit_figure

        return thickness_fit_figure(result)

    _finish(args, report.thickness_fit_document(result, crystal.summary()), figure)
    if not result.success:
        sys.stderr.write(f"laueline: {result.failure}\n")
        return EXIT_NOT_CONVERGED
    return 0


def _cmd_survey(args):
    from . import report
    from .survey import survey

    report.check_outputs([args.json], args.force, args.figure)
    crystal = _load_crystal(args)
    if (args.near is None) != (args.max_tilt_deg is None):
        raise InputError("--near and --max-tilt-deg go together")
    axes, frame = _sample_frame(args, crystal)
    result = survey(crystal, kv=args.kv, disk_mrad=args.disk_mrad, max_index=args.max_index,
                    near=args.near, max_tilt_deg=args.max_tilt_deg, gmax=args.gmax,
                    min_strength=args.min_strength, min_angle_deg=args.min_angle_deg,
                    sigma_mrad=args.sigma_mrad, line_sigma_mrad=args.line_sigma_mrad,
                    thickness_nm=args.thickness_nm, min_contrast=args.min_contrast,
                    component=args.component, axes=axes, frame_description=frame,
                    progress=True)
    print(report.survey_text(result, top=args.top))

    def figure():
        from .plot import survey_figure

        return survey_figure(result, crystal)

    _finish(args, report.survey_document(result), figure)
    return 0


def _truth_path(out):
    from pathlib import Path

    out = Path(out)
    return out.with_name(out.stem + ".truth.json")


def _cmd_render(args):
    from . import report
    from .images.io import IMAGE_SUFFIXES
    from .images.render import RenderSettings, render_pattern
    from .io.outputs import write_image

    from pathlib import Path

    if Path(args.out).suffix.lower() not in IMAGE_SUFFIXES:
        raise InputError(f"--out must end in one of {', '.join(IMAGE_SUFFIXES)}")
    truth_path = _truth_path(args.out)
    _check_dynamical_options(args)
    report.check_outputs([args.out, truth_path], args.force)
    crystal = _load_crystal(args)
    if args.cell is not None:
        crystal = crystal.with_cell(*args.cell)
    settings = RenderSettings(
        shape=(args.size[1], args.size[0]), center_px=args.center_px,
        scale_px_per_mrad=args.scale_px_per_mrad, rotation_deg=args.rotation_deg,
        mirror=args.mirror, line_width_mrad=args.line_width_mrad, line_depth=args.line_depth,
        min_strength=args.min_strength, background_tilt=args.background_tilt,
        background_angle_deg=args.background_angle_deg, blur_px=args.blur_px,
        dose=args.dose, seed=args.seed)
    image, truth = render_pattern(crystal, args.zone, args.kv, args.disk_mrad, settings,
                                  strain=args.strain, x_axis=args.x_axis, gmax=args.gmax,
                                  inner_potential=args.inner_potential,
                                  thickness_nm=args.thickness_nm if args.dynamical else None,
                                  absorption_ratio=args.absorption_ratio or 0.1)
    truth["image"] = str(args.out)
    write_image(args.out, image, force=args.force)
    report.write_json(truth, truth_path, args.force)
    print(f"rendered {crystal.name} [{' '.join(map(str, truth['zone']))}], {args.kv:g} kV: "
          f"{len(truth['lines'])} lines, {len(truth['crossings'])} crossings, "
          f"{image.shape[1]} x {image.shape[0]} px")
    print(f"wrote {args.out}, {truth_path}")
    return 0


def _add_image_options(p):
    """Options for reading a pattern out of an image or microscope file."""
    p.add_argument("--index", nargs="+", type=int, metavar="I",
                   help="the pattern of a stack or scan: one flat index or one per "
                        "navigation axis")
    p.add_argument("--allow-large-image", action="store_true",
                   help="read patterns above 4096 x 4096 px")


def _read_pattern_args(args, path):
    from .io.microscope import read_pattern

    index = None if args.index is None else \
        (args.index[0] if len(args.index) == 1 else tuple(args.index))
    return read_pattern(path, index=index, kv=getattr(args, "kv", None),
                        scale_px_per_mrad=getattr(args, "scale_px_per_mrad", None),
                        allow_large=args.allow_large_image)


def _cmd_detect(args):
    from . import report
    from .images.detect import detect_lines

    report.check_outputs([args.json], args.force, args.figure)
    seeded = args.structure is not None or args.zone is not None
    if seeded and (args.structure is None or args.zone is None or args.calibration is None):
        raise InputError("detection from a prediction needs --structure, --zone and "
                         "--calibration together")
    read = _read_pattern_args(args, args.pattern)
    image = read.image
    if seeded:
        from .images.detect import detect_seeded, find_disk
        from .lines import predict
        from .fit import Calibration

        document = report.read_json(args.calibration, "laueline.fit")
        cal = Calibration.from_document(document, source=args.calibration)
        kv, detector = cal.kv, cal.detector
        disk = find_disk(image) if args.disk_px is None else None
        distortion = cal.detector.distortion if any(cal.detector.distortion) else None
        if distortion is None and disk is not None:
            distortion = disk.detector_distortion
        detector = detector.replace(distortion=tuple(distortion or (0.0, 0.0)))
        if args.kv is not None:
            kv = args.kv
        disk_mrad = args.disk_mrad or (disk.radius_px if disk is not None else args.disk_px[2]) \
            / detector.scale_px_per_mrad
        pattern = predict(_load_crystal(args), args.zone, kv, disk_mrad, x_axis=args.x_axis,
                          min_strength=args.min_strength)
        det = detect_seeded(image, pattern, detector, disk=args.disk_px if disk is None else disk,
                            saturation=read.saturation, search_px=args.search_px,
                            min_angle_deg=args.min_angle_deg, source=args.pattern)
    else:
        det = detect_lines(image, disk=args.disk_px, saturation=read.saturation,
                           min_angle_deg=args.min_angle_deg, source=args.pattern)
    if len(det.good_lines) < 2:
        raise InputError(f"{args.pattern}: fewer than two lines found in the disk")
    print(read.metadata.text() + "\n")
    print(report.detection_text(det))

    def figure():
        from .plot import detection_figure

        return detection_figure(det, image)

    document = report.detection_document(det)
    document["file"] = report._clean(read.metadata.as_dict())
    _finish(args, document, figure)
    return 0


def _cmd_map(args):
    import json
    from pathlib import Path

    from . import report
    from .maps import map_summary_text, open_scan, plan_scan, map_strain
    from .fit import Calibration

    report.check_outputs([], args.force, args.figure)
    if Path(args.out).suffix.lower() != ".zarr":
        raise InputError(f"--out {args.out}: the result store must end in .zarr")
    if Path(args.out).exists() and not Path(args.out).is_dir():
        raise InputError(f"--out {args.out} exists and is not a zarr store")
    crystal = _load_crystal(args)
    try:
        doc = json.loads(Path(args.calibration).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise InputError(f"cannot read the calibration {args.calibration}: "
                         f"{str(exc).splitlines()[0]}") from None
    calibration = Calibration.from_document(doc, source=str(args.calibration))
    kv, detector = calibration.kv, calibration.detector
    _check_calibration_matches(calibration, crystal, args)
    disk_mrad = args.disk_mrad if args.disk_mrad is not None else \
        calibration.settings.get("disk_mrad", doc.get("disk_mrad"))
    if disk_mrad is None:
        raise InputError("the calibration does not record the disk radius; give --disk-mrad")
    x_axis = args.x_axis if args.x_axis is not None else calibration.x_axis
    axes, frame_text = _sample_frame(args, crystal)
    scan = open_scan(args.scan, chunk_patterns=args.chunk_patterns, step_nm=args.step_nm)
    reference = _map_reference(args, scan)
    plan = plan_scan(crystal, args.zone, (kv, detector), scan.pattern_shape,
                     disk_mrad=float(disk_mrad), x_axis=x_axis, min_strength=args.min_strength,
                     search_mrad=args.search_mrad, line_width_mrad=args.line_width_mrad,
                     inner_potential=args.inner_potential, sample_axes=axes,
                     reference=reference)
    if reference is None:
        print("caution: no --reference pattern: line positions are measured against the "
              "kinematic prediction, so every line's dynamical shift enters the strain; "
              "give the unstrained reference pattern to measure relative to it")
    print(f"scan {scan.source}: {scan.n_patterns} patterns of {scan.pattern_shape[1]} x "
          f"{scan.pattern_shape[0]} px, {' x '.join(map(str, scan.nav_shape))} "
          f"({', '.join(scan.nav_dims)}); {plan.n_lines} lines, {plan.n_points} profiles per "
          f"pattern; calibration {kv:.2f} kV, {detector.scale_px_per_mrad:.3f} px/mrad"
          + (", projector distortion e1 {:+.5f}, e2 {:+.5f} held".format(*detector.distortion)
             if any(detector.distortion) else ", no projector distortion"))
    _note_file_calibration(scan, kv, detector)
    ds = map_strain(scan, plan, out=args.out, force=args.force, scheduler=args.scheduler,
                    n_workers=args.workers, progress=not args.quiet)
    print(map_summary_text(ds, frame_text))
    written = [args.out]
    if args.figure:
        from .plot import map_figure, save_figure

        save_figure(map_figure(ds), args.figure)
        written.append(args.figure)
    print("\nwrote " + ", ".join(str(p) for p in written))
    return 0


def _note_file_calibration(scan, kv, detector):
    """Say what the scan file's metadata give, and where they differ from the calibration."""
    meta = scan.metadata if isinstance(getattr(scan, "metadata", None), dict) else {}
    for item in meta.get("taken", []):
        print(f"from the file: {item} (the calibration's values are used)")
    file_kv, file_scale = meta.get("kv_file"), meta.get("scale_file_px_per_mrad")
    if file_scale and abs(file_scale / detector.scale_px_per_mrad - 1) > 0.02:
        # a 2 % camera-length mismatch is beyond what projector settings repeat to
        print(f"caution: the file's camera scale {file_scale:.4g} px/mrad differs from the "
              f"calibration's {detector.scale_px_per_mrad:.4g} px/mrad by more than 2 %: "
              "was the reference recorded at the same camera length?")
    if file_kv and abs(file_kv - kv) > 0.05 * kv:
        print(f"caution: the file says {file_kv:g} kV, the calibration {kv:.2f} kV")


def _map_reference(args, scan):
    """The reference pattern asked for, as an array, or None."""
    import numpy as np

    if args.reference is not None and args.reference_index is not None:
        raise InputError("give either --reference or --reference-index, not both")
    if args.reference is not None:
        from .io.microscope import read_pattern

        try:
            return read_pattern(args.reference).image
        except InputError as exc:
            raise InputError(f"--reference: {exc}".replace(
                "choose one with index (--index)", "give a single-pattern file, or "
                "--reference-index for a pattern of the scan")) from None
    if args.reference_index is not None:
        index = tuple(args.reference_index)
        if len(index) != len(scan.nav_shape) or any(
                not 0 <= i < n for i, n in zip(index, scan.nav_shape)):
            raise InputError(f"--reference-index {' '.join(map(str, index))} is not a pattern "
                             f"of a scan of {' x '.join(map(str, scan.nav_shape))}")
        return np.asarray(scan.data[index].compute(), dtype=np.float32)
    return None


def _check_calibration_matches(calibration, crystal, args):
    """Refuse a calibration made on another structure or zone axis, or not converged."""
    from .frame import reduce_indices

    name = calibration.structure
    if name and crystal.name and name != crystal.name:
        raise InputError(f"the calibration was made on {name}, not on {crystal.name}")
    zone = calibration.zone
    if zone is not None and tuple(reduce_indices(zone)[0]) != tuple(reduce_indices(args.zone)[0]):
        raise InputError(f"the calibration was made at zone [{' '.join(map(str, zone))}], not "
                         f"at [{' '.join(map(str, args.zone))}]")
    if not calibration.converged:
        raise InputError("the calibration fit did not converge; make a new calibration")


def _cmd_demo(args):
    from .demo import run_demo

    run_demo(args.out, force=args.force)
    return 0


def _cmd_structures(args):
    from .crystal import bundled_structures, read_crystal

    print(f"{'name':18} {'formula':8} {'space group':16} {'No.':>4}  cell (A, deg)")
    for name in bundled_structures():
        c = read_crystal(name)
        a, b, cc, al, be, ga = c.cell
        print(f"{name:18} {c.formula:8} {c.space_group_symbol:16} {c.space_group_number:4d}  "
              f"{a:.4f} {b:.4f} {cc:.4f}  {al:g} {be:g} {ga:g}")
    return 0


# ---------------------------------------------------------------------------

def build_parser():
    parser = _Parser(prog="laueline",
                     description="HOLZ deficit lines in CBED patterns: predict them, fit strain to "
                                 "them, plan zone axes, measure foil thickness.",
                     epilog="New here? 'laueline demo --out laueline-demo' runs the whole job "
                            "on an invented device; 'laueline COMMAND --help' lists a "
                            "command's options.")
    from . import __version__

    parser.add_argument("--version", action="version", version=f"laueline {__version__}",
                        help="print the version and exit")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    p = sub.add_parser("predict", help="predict the deficit lines and crossings of a zone axis",
                       description="Predict the HOLZ deficit lines and their crossings in "
                                   "the central disk, on the exact loci.")
    _add_crystal_options(p)
    p.add_argument("--disk-mrad", type=float, default=6.0,
                   help="convergence semi-angle (disk radius) in mrad (6)")
    p.add_argument("--gmax", type=float, default=4.0, help="largest |g| in 1/A (4)")
    p.add_argument("--min-strength", type=float, default=0.05,
                   help="drop lines weaker than this relative strength (0.05)")
    p.add_argument("--min-angle-deg", type=float, default=5.0,
                   help="smallest angle between crossing lines in degrees (5)")
    state = p.add_mutually_exclusive_group()
    state.add_argument("--strain", nargs=6, type=float,
                       metavar=("EXX", "EYY", "EZZ", "EYZ", "EXZ", "EXY"),
                       help="strain of the reference Cartesian frame (tensor components)")
    state.add_argument("--cell", nargs=6, type=float,
                       metavar=("A", "B", "C", "ALPHA", "BETA", "GAMMA"),
                       help="cell parameters in A and deg replacing the CIF's")
    _add_dynamical_options(p)
    _add_output_options(p, csv=True)
    p.add_argument("--mark-crossings", action="store_true",
                   help="mark in the figure the crossings among the labelled (strongest) lines")
    p.set_defaults(run=_cmd_predict)

    p = sub.add_parser("refine", help="fit cell or strain (and detector, voltage) to crossings, "
                                      "to the lines of an image, or to several patterns",
                       description="Fit measured HOLZ line crossings or detected lines of one "
                                   "or several patterns: cell or strain, detector and "
                                   "optionally the voltage, with uncertainties.")
    p.add_argument("structure", help="CIF file or bundled structure name (see 'laueline structures')")
    p.add_argument("--zone", nargs="+", type=int, metavar="U",
                   help="zone axis [u v w] toward the source (four indices U V T W for a "
                        "hexagonal crystal); not with --patterns")
    p.add_argument("--kv", type=float, default=200.0, help="accelerating voltage in kV (200)")
    p.add_argument("--x-axis", nargs="+", type=int, metavar="H",
                   help="reflection fixing the disk x direction, H K L (H K I L hexagonal; "
                        "default: shortest visible zero-layer reflection)")
    p.add_argument("--b-iso", type=float, metavar="B",
                   help="one isotropic B in A^2 for all atoms (a cooled specimen sharpens lines)")
    p.add_argument("--inner-potential", action="store_true",
                   help="correct the wave number for the mean inner potential")
    p.add_argument("--points", metavar="CSV",
                   help="crossings in pixels: columns x, y (X, Y), optional h1 k1 l1 h2 k2 l2 "
                        "(i1 i2 for four-index labels) and sigma_px")
    p.add_argument("--image", metavar="PATTERN",
                   help="a pattern image (TIFF, PNG, .npy): detect its lines and fit them")
    p.add_argument("--patterns", metavar="LIST.json",
                   help="several patterns of one region, fitted with one strain (see README)")
    p.add_argument("--disk-px", nargs=3, type=float, metavar=("X", "Y", "R"),
                   help="with --image: the disk centre and radius in px instead of finding it")
    _add_image_options(p)
    p.add_argument("--y-up", action="store_true",
                   help="the points' y grows upward (default: down, as image rows)")
    p.add_argument("--model", choices=_Choices(".fit", "MODELS"), default="strain",
                   metavar="MODEL",
                   help="what of the crystal is refined: %(choices)s (strain)")
    p.add_argument("--unique-axis", choices=["a", "b", "c"],
                   help="unique axis of a tetragonal (c) or monoclinic (b) cell")
    p.add_argument("--free", nargs="+", action="extend", metavar="NAME",
                   help="free further parameters: kv, scale, center, rotation, distortion, "
                        "strain components or cell parameters")
    p.add_argument("--hold", nargs="+", action="extend", metavar="NAME",
                   help="hold parameters at their start values (strain components at zero, "
                        "crystal frame)")
    p.add_argument("--fix-strain", nargs="+", action="extend", metavar="NAME[=VALUE]",
                   help="hold strain components exactly (default 0), in the sample frame when "
                        "--sample-x/--sample-z are given, else the crystal frame")
    p.add_argument("--biaxial", action="store_true",
                   help="equal in-plane normal strains of the sample frame (exx = eyy)")
    p.add_argument("--zero-normal-stress", action="store_true",
                   help="no normal stress along the foil normal (needs elastic constants)")
    p.add_argument("--foil-normal", nargs=3, type=float, metavar=("U", "V", "W"),
                   help="crystal direction of the foil normal (default: --sample-z)")
    p.add_argument("--exclude-lines", nargs="+", type=int, action="extend", metavar="H",
                   help="leave these reflections out: H K L ... (H K I L for hexagonal)")
    p.add_argument("--tilt-tolerance-deg", type=float, default=1.0,
                   help="largest angle between a tilted zone axis and the beam (1)")
    p.add_argument("--center-px", nargs=2, type=float, metavar=("X", "Y"),
                   help="start value of the pattern centre (zone-axis direction) in px")
    p.add_argument("--scale-px-per-mrad", type=float, help="start value of the camera scale")
    p.add_argument("--rotation-deg", type=float, help="start value of the detector rotation")
    p.add_argument("--mirror", dest="mirror", action="store_const", const=True, default=None,
                   help="the detector shows the disk frame mirrored")
    p.add_argument("--no-mirror", dest="mirror", action="store_const", const=False,
                   help="the detector does not mirror (default: decided from the data)")
    p.add_argument("--calibration", metavar="FIT.json",
                   help="a reference fit: hold its voltage, scale and distortion, start from "
                        "its centre, rotation and mirror")
    p.add_argument("--robust", action="store_true",
                   help="down-weight outliers and list those rejected")
    p.add_argument("--line-sigma-px", type=float, default=None,
                   help="sigma in px of an offset shared by all observations of one line "
                        "(default: estimated from the residuals grouped by line)")
    p.add_argument("--disk-mrad", type=float, default=None,
                   help="disk radius in mrad for predicting and checking crossings (6); with "
                        "--image it sets the camera scale from the detected radius unless "
                        "--scale-px-per-mrad or --calibration gives the scale")
    p.add_argument("--min-strength", type=float, default=0.05,
                   help="lines weaker than this relative strength are not candidates for "
                        "matching (0.05, as in predict, survey and render)")
    p.add_argument("--min-angle-deg", type=float, default=5.0,
                   help="smallest crossing angle of candidates in degrees (5)")
    p.add_argument("--match-mrad", type=float, default=0.25,
                   help="initial distance gate for assigning unlabelled points, mrad (0.25)")
    elastic = p.add_mutually_exclusive_group()
    elastic.add_argument("--cubic-elastic-GPa", dest="cubic_elastic_gpa", nargs=3, type=float,
                         metavar=("C11", "C12", "C44"),
                         help="cubic elastic constants in GPa, for the stress")
    elastic.add_argument("--stiffness-GPa", dest="stiffness_gpa", metavar="FILE",
                         help="6x6 Voigt stiffness in GPa (reference Cartesian frame)")
    _add_sample_frame_options(p)
    _add_dynamical_options(p)
    p.add_argument("--thickness-sigma-nm", type=float, metavar="S",
                   help="1-sigma of the thickness for the systematic uncertainty (10 %%)")
    _add_output_options(p)
    p.set_defaults(run=_cmd_refine, kv=None)  # None: the image file's voltage, else 200

    p = sub.add_parser("thickness", help="foil thickness from two-beam CBED fringes",
                       description="Foil thickness and extinction distance from the dark "
                                   "fringes of a two-beam CBED disk (Kelly et al. 1975; "
                                   "Allen 1981).")
    p.add_argument("structure", nargs="?",
                   help="CIF file or bundled structure (with --hkl)")
    _add_block_option(p)
    p.add_argument("--hkl", nargs=3, type=int, metavar=("H", "K", "L"),
                   help="the reflection excited in two-beam condition")
    p.add_argument("--d-spacing-A", dest="d_spacing_A", type=float, metavar="D",
                   help="its d-spacing in A, instead of a structure")
    p.add_argument("--kv", type=float, default=200.0, help="accelerating voltage in kV (200)")
    p.add_argument("--b-iso", type=float, metavar="B",
                   help="one isotropic B in A^2 for all atoms")
    p.add_argument("--separation-px", type=float, metavar="D",
                   help="distance between the direct and diffracted disk centres")
    p.add_argument("--fringes-px", nargs="+", type=float, metavar="X",
                   help="distances from the diffracted disk's centre line to successive "
                        "dark fringes (same unit)")
    p.add_argument("--position-sigma-px", type=float, metavar="S",
                   help="standard uncertainty of every measured distance")
    p.add_argument("--profile", metavar="CSV",
                   help="intensity profile along +g through both disks: position, intensity")
    p.add_argument("--first-index", type=int, metavar="N",
                   help="force the index of the first fringe instead of searching")
    p.add_argument("--dynamical", action="store_true",
                   help="fit many-beam (systematic-row Bloch-wave) intensities to the whole "
                        "--profile; needs the structure and --hkl")
    p.add_argument("--absorption-ratio", type=float, default=0.1, metavar="A",
                   help="with --dynamical: absorptive potential as a fraction of the "
                        "elastic one, in [0, 1): where the search for it starts, or the "
                        "value held with --hold-absorption (0.1)")
    p.add_argument("--hold-absorption", action="store_true",
                   help="with --dynamical: hold the absorption ratio instead of fitting it")
    p.add_argument("--row-beams", type=int, default=9, metavar="N",
                   help="with --dynamical: beams of the systematic row, odd (9)")
    p.add_argument("--thickness-range-nm", type=float, nargs=2, default=(20.0, 1000.0),
                   metavar=("LOW", "HIGH"),
                   help="with --dynamical: range of thickness searched (20 1000)")
    _add_output_options(p)
    p.set_defaults(run=_cmd_thickness)

    p = sub.add_parser("relaxation", help="fit split or broadened lines of a thin lamella",
                       description="Fit the profiles of the HOLZ lines of one pattern to the "
                                   "strain at mid-foil and its relaxation through the foil "
                                   "(kinematic line-profile model), with the voltage and "
                                   "camera scale of a reference calibration held.")
    p.add_argument("structure", help="CIF file or bundled structure name")
    p.add_argument("--zone", nargs=3, type=int, required=True, metavar=("U", "V", "W"),
                   help="zone axis [u v w], pointing toward the source")
    p.add_argument("--x-axis", nargs=3, type=int, metavar=("H", "K", "L"),
                   help="reflection fixing the disk x direction (default: as 'predict')")
    p.add_argument("--b-iso", type=float, metavar="B",
                   help="one isotropic B in A^2 for all atoms")
    p.add_argument("--image", required=True, metavar="FILE", help="the pattern (TIFF, PNG, .npy)")
    p.add_argument("--calibration", required=True, metavar="CAL.json",
                   help="reference fit ('laueline refine ... --json'): voltage and scale held")
    p.add_argument("--thickness-nm", type=float, required=True, metavar="T",
                   help="foil thickness in nm (for example from 'laueline thickness')")
    shape = p.add_mutually_exclusive_group()
    shape.add_argument("--model", choices=("uniform", "cosh", "relaxed-strain"),
                       help="relaxation through the foil: cosh (default; surface displacement "
                            "decaying as cosh from the mid-plane), relaxed-strain (the strain "
                            "itself relaxing towards both surfaces) or uniform")
    shape.add_argument("--displacement-table", metavar="CSV",
                       help="relaxation from a table: z_nm with ux_nm, uy_nm, uz_nm or exz, "
                            "eyz, ezz (disk frame); its size is fitted")
    p.add_argument("--half-width-px", type=float, metavar="W",
                   help="half-width of each profile (default: from the thickness)")
    p.add_argument("--instrument-sigma-px", type=float, metavar="S",
                   help="Gaussian blur of a line by the instrument, px (default: fitted)")
    p.add_argument("--segments", type=int, default=2,
                   help="profiles per line, taken along stretches of it (2)")
    p.add_argument("--profile-min-strength", type=float, default=0.1,
                   help="weaker lines are neither profiled nor kept clear of (0.1; a "
                        "profile needs more contrast than a line position)")
    p.add_argument("--disk-px", nargs=3, type=float, metavar=("X", "Y", "R"),
                   help="disk centre and radius in px instead of finding it")
    _add_output_options(p)
    p.set_defaults(run=_cmd_relaxation)

    p = sub.add_parser("survey", help="rank zone axes by the strain precision they deliver",
                       description="Rank zone axes by the predicted precision of the strain "
                                   "after a reference calibration (centre and rotation free, "
                                   "voltage and scale held), counting only the lines visible "
                                   "at the foil thickness and with an error per line.")
    p.add_argument("structure", help="CIF file or bundled structure name")
    _add_block_option(p)
    p.add_argument("--kv", type=float, default=200.0, help="accelerating voltage in kV (200)")
    p.add_argument("--disk-mrad", type=float, default=6.0,
                   help="convergence semi-angle in mrad (6)")
    p.add_argument("--max-index", type=int, default=7,
                   help="candidates [u v w] with max |index| up to this (7)")
    p.add_argument("--near", nargs=3, type=float, metavar=("U", "V", "W"),
                   help="keep every axis within --max-tilt-deg of this orientation")
    p.add_argument("--max-tilt-deg", type=float, metavar="T", help="holder tilt range")
    p.add_argument("--gmax", type=float, default=4.0,
                   help="largest |g| in 1/A (4; raised per axis to reach its first HOLZ ring)")
    p.add_argument("--min-strength", type=float, default=0.05,
                   help="lines weaker than this are not considered (0.05)")
    p.add_argument("--min-angle-deg", type=float, default=5.0,
                   help="smallest usable crossing angle in degrees (5)")
    # the survey's defaults, repeated so that building the parser imports nothing
    # heavy (tests/test_survey.py checks they agree)
    DEFAULT_LINE_SIGMA_MRAD, DEFAULT_THICKNESS_NM, DEFAULT_MIN_CONTRAST = 0.002, 200.0, 0.02

    p.add_argument("--sigma-mrad", type=float, default=0.005,
                   help="independent noise of a measured crossing coordinate in mrad (0.005)")
    p.add_argument("--line-sigma-mrad", type=float, default=DEFAULT_LINE_SIGMA_MRAD,
                   help="offset of a whole line along its normal, shared by its crossings, "
                        f"in mrad ({DEFAULT_LINE_SIGMA_MRAD:g}; 0 treats crossings as "
                        "independent)")
    p.add_argument("--thickness-nm", type=float, default=DEFAULT_THICKNESS_NM,
                   help=f"foil thickness for the line contrast estimate in nm "
                        f"({DEFAULT_THICKNESS_NM:g})")
    p.add_argument("--min-contrast", type=float, default=DEFAULT_MIN_CONTRAST,
                   help="lines with a shallower estimated dip are not seen "
                        f"({DEFAULT_MIN_CONTRAST:g})")

    p.add_argument("--component", choices=_Choices(".survey", "COMPONENTS"),
                   metavar="COMPONENT",
                   help="rank by this strain component, one of %(choices)s (default: the "
                        "worst of the six)")
    p.add_argument("--top", type=int, default=15, help="rows printed (15)")
    p.add_argument("--b-iso", type=float, metavar="B",
                   help="one isotropic B in A^2 for all atoms")
    _add_sample_frame_options(p)
    _add_output_options(p)
    p.set_defaults(run=_cmd_survey)

    p = sub.add_parser("render", help="render a synthetic pattern with a truth file",
                       description="Render a synthetic central disk with HOLZ lines on their "
                                   "exact loci; a truth JSON beside the image records every "
                                   "parameter and the true crossings in pixels.")
    _add_crystal_options(p)
    p.add_argument("--disk-mrad", type=float, default=6.0, help="disk radius in mrad (6)")
    p.add_argument("--gmax", type=float, default=4.0, help="largest |g| in 1/A (4)")
    state = p.add_mutually_exclusive_group()
    state.add_argument("--strain", nargs=6, type=float,
                       metavar=("EXX", "EYY", "EZZ", "EYZ", "EXZ", "EXY"),
                       help="strain of the reference Cartesian frame (tensor components); "
                            "the pattern is drawn with basis (I + e) A")
    state.add_argument("--cell", nargs=6, type=float,
                       metavar=("A", "B", "C", "ALPHA", "BETA", "GAMMA"),
                       help="cell parameters in A and deg replacing the CIF's")
    p.add_argument("--out", required=True, metavar="PATTERN",
                   help="image file (.tif, .png, .npy); the truth goes to PATTERN.truth.json")
    p.add_argument("--size", nargs=2, type=int, default=[512, 512], metavar=("W", "H"),
                   help="image width and height in px (512 512)")
    p.add_argument("--scale-px-per-mrad", type=float,
                   help="camera scale (default: the disk fills 84 %% of the smaller side)")
    p.add_argument("--center-px", nargs=2, type=float, metavar=("X", "Y"),
                   help="pattern centre (default: the image centre)")
    p.add_argument("--rotation-deg", type=float, default=0.0, help="detector rotation (0)")
    p.add_argument("--mirror", action="store_true", help="mirror the disk frame")
    p.add_argument("--line-width-mrad", type=float, default=0.06,
                   help="full width at half depth of a line (0.06)")
    p.add_argument("--line-depth", type=float, default=0.6,
                   help="relative depth of a line of strength 1 (0.6)")
    p.add_argument("--min-strength", type=float, default=0.05,
                   help="lines weaker than this relative strength are not drawn (0.05)")
    p.add_argument("--background-tilt", type=float, default=0.2,
                   help="relative background change across the disk (0.2)")
    p.add_argument("--background-angle-deg", type=float, default=30.0,
                   help="direction of that gradient (30)")
    p.add_argument("--blur-px", type=float, default=0.7,
                   help="detector blur, Gaussian sigma in px (0.7)")
    p.add_argument("--dose", type=float, default=2000.0,
                   help="counts per pixel on the disk; 0 for no noise (2000)")
    p.add_argument("--seed", type=int, default=0, help="noise seed (0)")
    _add_dynamical_options(p)
    p.add_argument("--force", action="store_true", help="overwrite existing files")
    p.set_defaults(run=_cmd_render)

    p = sub.add_parser("detect", help="find the disk, its lines and crossings in an image",
                       description="Find the central disk and its HOLZ lines to sub-pixel "
                                   "precision, with their crossings and uncertainties.")
    p.add_argument("pattern", help="image file (TIFF, PNG, .npy) or microscope file (.dm3, "
                                   ".dm4, .emd, .mrc, .mib, .blo, .hspy, .zspy)")
    p.add_argument("--disk-px", nargs=3, type=float, metavar=("X", "Y", "R"),
                   help="disk centre and radius in px instead of finding it")
    _add_image_options(p)
    p.add_argument("--kv", type=float,
                   help="voltage in kV, overriding the file's (converts reciprocal pixel sizes)")
    p.add_argument("--scale-px-per-mrad", type=float,
                   help="camera scale overriding the one taken from the file")
    seed = p.add_argument_group("detection from a prediction (faster; finds weak lines)")
    seed.add_argument("--structure", help="CIF file or bundled structure name")
    seed.add_argument("--zone", nargs=3, type=int, metavar=("U", "V", "W"), help="zone axis")
    seed.add_argument("--x-axis", nargs=3, type=int, metavar=("H", "K", "L"),
                      help="reflection fixing the disk x direction")
    seed.add_argument("--calibration", metavar="FIT.json",
                      help="a fit whose voltage and detector place the predicted lines")
    seed.add_argument("--disk-mrad", type=float,
                      help="disk radius in mrad (default: the found disk over the scale)")
    seed.add_argument("--min-strength", type=float, default=0.05,
                      help="predicted lines weaker than this are not sought (0.05)")
    seed.add_argument("--search-px", type=float, default=3.0,
                      help="how far a line may lie from its predicted place, px (3)")
    p.add_argument("--min-angle-deg", type=float, default=5.0,
                   help="smallest angle between crossing lines (5)")
    _add_output_options(p)
    p.set_defaults(run=_cmd_detect)

    p = sub.add_parser("map", help="fit the strain of every pattern of a scan",
                       description="Fit every pattern of a line scan or a 4D-STEM map with a "
                                   "calibration held, on all cores or a Dask cluster; results "
                                   "go into a zarr store written chunk by chunk (a killed run "
                                   "started again continues where it stopped).")
    _add_crystal_options(p)
    p.add_argument("--scan", required=True, metavar="FILE",
                   help="the scan: .npy or .zarr array (n, rows, cols) or (ny, nx, rows, "
                        "cols), a folder of pattern images, or a microscope file")
    p.add_argument("--calibration", required=True, metavar="FIT.json",
                   help="calibration from 'laueline refine --json' on a reference pattern")
    p.add_argument("--out", required=True, metavar="RESULT.zarr", help="result store")
    p.add_argument("--disk-mrad", type=float,
                   help="convergence semi-angle in mrad (default: the calibration's)")
    p.add_argument("--min-strength", type=float, default=0.05,
                   help="weakest line sampled, relative to the strongest (0.05)")
    p.add_argument("--reference", metavar="PATTERN",
                   help="image of the unstrained reference region (the calibration's "
                        "pattern): strain is measured relative to its line positions")
    p.add_argument("--reference-index", type=int, nargs="+", metavar="I",
                   help="use this pattern of the scan as the reference (one index for a "
                        "line scan, row and column for a map)")
    p.add_argument("--line-width-mrad", type=float, default=0.06,
                   help="typical full width of a line at half depth, mrad (0.06)")
    p.add_argument("--search-mrad", type=float, default=0.3,
                   help="largest line shift searched for, mrad (0.3, about a strain of 2e-3)")
    p.add_argument("--step-nm", type=float, help="scan step in nm (overrides the file's)")
    p.add_argument("--chunk-patterns", type=int, default=64,
                   help="patterns per chunk, the unit of work and of resuming (64)")
    p.add_argument("--workers", type=int, help="local worker processes (all cores)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="address of a running dask.distributed scheduler to run on")
    _add_sample_frame_options(p)
    p.add_argument("--figure", metavar="PATH", help="write strain maps or profiles here")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--force", action="store_true",
                   help="start the store afresh and overwrite the figure")
    p.set_defaults(run=_cmd_map)

    p = sub.add_parser("demo", help="run the demonstration on an invented device",
                       description="Render a reference and a strained pattern of an invented "
                                   "silicon device, calibrate on the reference, fit the strain "
                                   "from the image and compare with the truth.")
    p.add_argument("--out", default="laueline-demo", help="output folder (laueline-demo)")
    p.add_argument("--force", action="store_true", help="overwrite existing files")
    p.set_defaults(run=_cmd_demo)

    p = sub.add_parser("structures", help="list the bundled structures")
    p.set_defaults(run=_cmd_structures)
    return parser


# ---------------------------------------------------------------------------
# checks at the door: numbers, conflicting options, input files, outputs
# ---------------------------------------------------------------------------

#: Options naming text files laueline reads (dest names); they must be UTF-8.
_TEXT_INPUTS = ("points", "calibration", "profile", "stiffness_gpa")
#: Options naming any input file (outputs may not overwrite them).
_INPUTS = _TEXT_INPUTS + ("structure", "image", "pattern")


def _command_parser(parser, command):
    for action in parser._subparsers._group_actions:
        if command in action.choices:
            return action.choices[command]
    return parser


def _option_labels(subparser):
    """dest -> the option as the user types it (``--kv``), or the positional name."""
    return {a.dest: (a.option_strings[-1] if a.option_strings else a.dest)
            for a in subparser._actions}


def _given_options(subparser, argv):
    """Destinations of the options that appear on the command line (abbreviations too)."""
    strings = {s: a.dest for a in subparser._actions for s in a.option_strings}
    given = set()
    for token in argv:
        if not token.startswith("--"):
            continue
        name = token.split("=", 1)[0]
        if name in strings:
            given.add(strings[name])
        else:
            matches = {d for s, d in strings.items() if s.startswith(name)}
            if len(matches) == 1:
                given |= matches
    return given


def _check_numbers(args, labels):
    """Every numeric option finite and within its range of :data:`laueline.limits.RANGES`."""
    import math

    from .limits import RANGES, check_value

    for dest, value in vars(args).items():
        values = value if isinstance(value, list) else [value]
        if not values or not all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                 for v in values):
            continue
        label = labels.get(dest, dest)
        if dest in RANGES:
            check_value(dest, value, label)
        elif not all(math.isfinite(v) for v in values):
            raise InputError(f"{label} must be finite, got {' '.join(map(str, values))}")


def _conflict(a, b, why):
    raise InputError(f"{a} and {b} cannot be used together: {why}")


def _ignored(option, why):
    raise InputError(f"{option} would be ignored: {why}")


def _check_conflicts(args, given):
    """Options that contradict each other or that the command would ignore."""
    cmd = args.command
    disk_px = getattr(args, "disk_px", None)
    if disk_px is not None and disk_px[2] <= 0:
        raise InputError(f"--disk-px radius must be positive, got {disk_px[2]:g}")
    if cmd == "thickness":
        if args.d_spacing_A is not None and args.hkl is not None:
            _conflict("--d-spacing-A", "--hkl", "both give the reflection; give one")
        if args.d_spacing_A is not None and args.structure is not None:
            _conflict("--d-spacing-A", "a structure",
                      "the structure is only used with --hkl; give one")
        if args.d_spacing_A is not None and args.b_iso is not None:
            _conflict("--d-spacing-A", "--b-iso", "B needs a structure with --hkl")
        if args.block is not None and args.structure is None:
            _ignored("--block", "a data block is chosen in a structure's CIF file")
        if args.profile and args.position_sigma_px is not None:
            _conflict("--profile", "--position-sigma-px",
                      "a profile's fringe uncertainties come from the profile itself")
    elif cmd == "render":
        if args.center_px is not None:
            x, y = args.center_px
            width, height = args.size
            if not (0 <= x < width and 0 <= y < height):
                raise InputError(f"--center-px {x:g} {y:g} lies outside the {width} x "
                                 f"{height} px image of --size; the pattern would be blank")
    elif cmd == "predict":
        if args.mark_crossings and not args.figure:
            _ignored("--mark-crossings", "crossings are marked in a figure; add --figure PATH")
    elif cmd == "refine":
        if args.points is not None and args.disk_px is not None:
            _conflict("--disk-px", "--points", "the disk is only searched for in an --image")
        if args.calibration is not None and "kv" in given:
            _conflict("--kv", "--calibration", "the calibration's effective voltage is held; "
                      "leave --kv out")
        if args.image is not None and "match_mrad" in given:
            _conflict("--match-mrad", "--image",
                      "the matching gate applies to point files; image lines are matched "
                      "by their detection")


def _check_input_files(args, labels):
    """Input files exist, are files, and text inputs decode as UTF-8."""
    from pathlib import Path

    for dest in _TEXT_INPUTS:
        value = getattr(args, dest, None)
        if value is None:
            continue
        path = Path(value)
        label = labels.get(dest, dest)
        try:
            exists = path.exists()
        except OSError as exc:
            raise InputError(f"cannot read {path} ({label}): {exc.strerror}") from None
        if not exists:
            raise InputError(f"cannot read {path} ({label}): no such file")
        if not path.is_file():
            raise InputError(f"cannot read {path} ({label}): not a file")
        try:
            path.read_bytes().decode("utf-8")
        except OSError as exc:
            raise InputError(f"cannot read {path} ({label}): {exc.strerror}") from None
        except UnicodeDecodeError as exc:
            raise InputError(f"{path} ({label}) is not UTF-8 text (byte {exc.start}); "
                             "save it as UTF-8") from None


def _csv_outputs(args):
    return list(_csv_pair(args.csv)) if getattr(args, "csv", None) else []


def _output_plan(args):
    """The outputs of the command, registered before any work and checked together."""
    from .io.outputs import OutputPlan

    paths = [getattr(args, "json", None), *_csv_outputs(args), getattr(args, "figure", None)]
    if args.command == "render":
        paths += [args.out, _truth_path(args.out)]
    plan = OutputPlan(paths, force=getattr(args, "force", False))
    plan.check(figure=getattr(args, "figure", None),
               inputs=[getattr(args, d, None) for d in _INPUTS])
    return plan


def _check_arguments(parser, args, argv):
    sub = _command_parser(parser, args.command)
    labels = _option_labels(sub)
    _check_numbers(args, labels)
    _check_conflicts(args, _given_options(sub, argv))
    _check_input_files(args, labels)


# ---------------------------------------------------------------------------
# signals
# ---------------------------------------------------------------------------

class _Interrupted(BaseException):
    """Raised by the signal handler so that temporaries are removed on the way out."""

    def __init__(self, signum):
        super().__init__(signum)
        self.signum = signum


def _on_signal(signum, frame):
    import signal

    for s in _HANDLED_SIGNALS:  # a second signal must not interrupt the clean-up
        signal.signal(s, signal.SIG_IGN)
    raise _Interrupted(signum)


def _handled_signals():
    import signal

    return tuple(getattr(signal, n) for n in ("SIGINT", "SIGTERM", "SIGHUP")
                 if hasattr(signal, n))


_HANDLED_SIGNALS = _handled_signals()


def _install_signal_handlers():
    """Install the handlers in the main thread; return the previous ones."""
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        return {}
    previous = {}
    for s in _HANDLED_SIGNALS:
        try:
            previous[s] = signal.signal(s, _on_signal)
        except (OSError, ValueError):
            pass
    return previous


def _restore_signal_handlers(previous):
    import signal

    for s, handler in previous.items():
        signal.signal(s, handler)


def _signal_name(signum):
    import signal

    return {signal.SIGINT: "interrupted (Ctrl-C)"}.get(signum, "terminated by signal "
                                                      f"{signal.Signals(signum).name}")


class _ClosablePipe:
    """stdout that falls silent when its reader goes away (``laueline ... | head``),
    so that the command still finishes and writes its files."""

    def __init__(self, stream):
        self._stream = stream

    def write(self, text):
        try:
            return self._stream.write(text)
        except BrokenPipeError:
            import os

            os.dup2(os.open(os.devnull, os.O_WRONLY), self._stream.fileno())
            return len(text)

    def flush(self):
        try:
            self._stream.flush()
        except BrokenPipeError:
            import os

            os.dup2(os.open(os.devnull, os.O_WRONLY), self._stream.fileno())

    def __getattr__(self, name):
        return getattr(self._stream, name)


def _run(parser, args, argv):
    """Check everything, run the command with its outputs staged, name them at the end."""
    import contextlib
    import warnings

    _check_arguments(parser, args, argv)
    plan = _output_plan(args)
    with plan.active(), warnings.catch_warnings(), \
            contextlib.redirect_stdout(_ClosablePipe(sys.stdout)):
        # numerical libraries' warnings are not messages for the user; laueline's
        # own warnings travel in the results and the report
        warnings.simplefilter("ignore", RuntimeWarning)
        try:
            status = args.run(args)
        except FitError:
            plan.commit()  # a fit's JSON with "success": false is still wanted
            raise
        plan.commit()
        sys.stdout.flush()  # through the wrapper: a closed pipe is not an error
    return status


def main(argv=None):
    """Entry point of the ``laueline`` console script; returns the exit status.

    0 success, 2 bad input, 3 a fit that did not converge, 128 + N after
    signal N (130 for Ctrl-C, 143 for SIGTERM).  Every failure prints one
    line on stderr; no output file is left behind or half-written.
    """
    import os

    argv = sys.argv[1:] if argv is None else [str(a) for a in argv]
    previous = _install_signal_handlers()
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        return _run(parser, args, argv)
    except InputError as exc:
        sys.stderr.write(f"laueline: error: {exc}\n")
        return EXIT_INPUT
    except FitError as exc:
        sys.stderr.write(f"laueline: fit did not converge: {exc}\n")
        return EXIT_NOT_CONVERGED
    except (_Interrupted, KeyboardInterrupt) as exc:
        import signal

        signum = getattr(exc, "signum", signal.SIGINT)
        sys.stderr.write(f"laueline: {_signal_name(signum)}; no output written\n")
        return 128 + int(signum)
    except MemoryError:
        sys.stderr.write("laueline: error: not enough memory for this job; reduce --gmax, "
                         "the image size or the structure\n")
        return EXIT_INPUT
    except BrokenPipeError:  # output piped into head or less and closed early
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except Exception as exc:  # an internal fault: one line, the details on request
        if os.environ.get("LAUELINE_TRACEBACK"):
            raise
        first = str(exc).splitlines()[0] if str(exc) else ""
        sys.stderr.write(f"laueline: internal error ({type(exc).__name__}: {first}); please "
                         "report it (LAUELINE_TRACEBACK=1 shows the details)\n")
        return 1
    finally:
        _restore_signal_handlers(previous)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
