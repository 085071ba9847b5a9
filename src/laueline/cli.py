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


def _add_crystal_options(p):
    p.add_argument("structure", help="CIF file or bundled structure name (see 'laueline structures')")
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

        save_figure(figure(), args.figure)
    written = [p for p in (getattr(args, "json", None), *extra, getattr(args, "figure", None))
               if p]
    if written:
        print("\nwrote " + ", ".join(str(p) for p in written))


def _load_crystal(args):
    from .crystal import read_crystal

    crystal = read_crystal(args.structure)
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
    """(axes, description) of the sample frame asked for, or (None, 'reference-cartesian')."""
    from .strain import sample_axes

    if (args.sample_x is None) != (args.sample_z is None):
        raise InputError("a sample frame needs both --sample-x and --sample-z")
    if args.sample_x is None:
        return None, "reference-cartesian"
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


def _cmd_refine(args):
    from . import report

    args.disk_mrad_given = args.disk_mrad is not None
    if args.disk_mrad is None:
        args.disk_mrad = 6.0
    from .points import read_points
    from .refine import calibration_from_document, refine

    _check_dynamical_options(args)
    report.check_outputs([args.json], args.force, args.figure)
    crystal = _load_crystal(args)
    if (args.points is None) == (args.image is None):
        raise InputError("give either --points CSV or --image PATTERN")
    calibration = None
    if args.calibration:
        calibration = calibration_from_document(
            report.read_json(args.calibration, "laueline.fit"))
    stiffness, axes = _stiffness_and_axes(args, crystal)
    flip = -1.0 if args.y_up else 1.0
    center = None if args.center_px is None else (args.center_px[0], flip * args.center_px[1])
    common = dict(kv=args.kv, model=args.model, x_axis=args.x_axis, free=args.free or (),
                  hold=args.hold or (), unique_axis=args.unique_axis, center_px=center,
                  scale_px_per_mrad=args.scale_px_per_mrad, rotation_deg=args.rotation_deg,
                  mirror=args.mirror, calibration=calibration, robust=args.robust,
                  min_strength=args.min_strength, inner_potential=args.inner_potential,
                  stiffness=stiffness, sample_axes=axes)
    image = None
    if args.image:
        from .images.detect import detect_lines
        from .images.io import read_image
        from .refine import refine_image

        if args.y_up:
            raise InputError("--y-up applies to point files; images are read row by row")
        image, saturation = read_image(args.image)
        detection = detect_lines(image, disk=args.disk_px, saturation=saturation,
                                 min_angle_deg=args.min_angle_deg, source=args.image)
        observations = detection
        options = dict(common, disk_mrad=args.disk_mrad if args.disk_mrad_given else None)
        fit = refine_image
    else:
        observations = read_points(args.points, y_up=args.y_up)
        options = dict(common, disk_mrad=args.disk_mrad, min_angle_deg=args.min_angle_deg,
                       match_mrad=args.match_mrad)
        fit = refine
    dynamical = None
    if args.dynamical:
        from .dynamical import refine_dynamical

        dynamical = refine_dynamical(crystal, args.zone, observations,
                                     thickness_nm=args.thickness_nm,
                                     thickness_sigma_nm=args.thickness_sigma_nm,
                                     absorption_ratio=args.absorption_ratio, **options)
        result = dynamical.result
    else:
        result = fit(crystal, args.zone, observations, **options)
    print(report.fit_text(result, y_up=args.y_up))
    if dynamical is not None:
        from .dynamical import dynamical_fit_text

        print(dynamical_fit_text(dynamical))

    def figure():
        from .plot import fit_figure

        return fit_figure(result, crystal, image=image)

    document = report.fit_document(result, y_up=args.y_up, calibration_source=args.calibration,
                                   points_source=args.points or args.image)
    if dynamical is not None:
        from .dynamical import dynamical_fit_document

        document = dynamical_fit_document(
            document, dynamical, report.fit_document(dynamical.kinematic, y_up=args.y_up))
    _finish(args, document, figure)
    if not result.converged:
        sys.stderr.write("laueline: the fit did not converge; see the warnings\n")
        return EXIT_NOT_CONVERGED
    if dynamical is not None and not dynamical.settled:
        sys.stderr.write("laueline: the dynamical correction did not settle; the strain "
                         "kept changing by more than a tenth of its sigma\n")
        return EXIT_NOT_CONVERGED
    return 0


def _cmd_thickness(args):
    from . import report
    from .thickness import detect_profile, read_profile, thickness_from_fringes

    report.check_outputs([args.json], args.force, args.figure)
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
                    sigma_mrad=args.sigma_mrad, component=args.component, axes=axes,
                    frame_description=frame, progress=True)
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
    from .images.io import IMAGE_SUFFIXES, write_image
    from .images.render import RenderSettings, render_pattern

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


def _cmd_detect(args):
    from . import report
    from .images.detect import detect_lines
    from .images.io import read_image

    report.check_outputs([args.json], args.force, args.figure)
    image, saturation = read_image(args.pattern)
    det = detect_lines(image, disk=args.disk_px, saturation=saturation,
                       min_angle_deg=args.min_angle_deg, source=args.pattern)
    if len(det.good_lines) < 2:
        raise InputError(f"{args.pattern}: fewer than two lines found in the disk")
    print(report.detection_text(det))

    def figure():
        from .plot import detection_figure

        return detection_figure(det, image)

    _finish(args, report.detection_document(det), figure)
    return 0


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
                                 "them, plan zone axes, measure foil thickness.")
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
    p.add_argument("--mark-crossings", action="store_true", help="mark crossings in the figure")
    p.set_defaults(run=_cmd_predict)

    p = sub.add_parser("refine", help="fit cell or strain (and detector, voltage) to crossings "
                                      "or to the lines of an image",
                       description="Fit measured HOLZ line crossings: cell or strain, detector "
                                   "and optionally the voltage, with uncertainties.")
    _add_crystal_options(p)
    p.add_argument("--points", metavar="CSV",
                   help="crossings in pixels: columns x, y (X, Y), optional h1 k1 l1 h2 k2 l2 "
                        "and sigma_px")
    p.add_argument("--image", metavar="PATTERN",
                   help="a pattern image (TIFF, PNG, .npy): detect its lines and fit them")
    p.add_argument("--disk-px", nargs=3, type=float, metavar=("X", "Y", "R"),
                   help="with --image: the disk centre and radius in px instead of finding it")
    p.add_argument("--y-up", action="store_true",
                   help="the points' y grows upward (default: down, as image rows)")
    from .refine import MODELS

    p.add_argument("--model", choices=MODELS, default="strain",
                   help="what of the crystal is refined (strain)")
    p.add_argument("--unique-axis", choices=["a", "b", "c"],
                   help="unique axis of a tetragonal (c) or monoclinic (b) cell")
    p.add_argument("--free", nargs="+", action="extend", metavar="NAME",
                   help="free further parameters: kv, scale, center, rotation, strain "
                        "components or cell parameters")
    p.add_argument("--hold", nargs="+", action="extend", metavar="NAME",
                   help="hold parameters at their start values")
    p.add_argument("--center-px", nargs=2, type=float, metavar=("X", "Y"),
                   help="start value of the pattern centre (zone-axis direction) in px")
    p.add_argument("--scale-px-per-mrad", type=float, help="start value of the camera scale")
    p.add_argument("--rotation-deg", type=float, help="start value of the detector rotation")
    p.add_argument("--mirror", dest="mirror", action="store_const", const=True, default=None,
                   help="the detector shows the disk frame mirrored")
    p.add_argument("--no-mirror", dest="mirror", action="store_const", const=False,
                   help="the detector does not mirror (default: decided from the data)")
    p.add_argument("--calibration", metavar="FIT.json",
                   help="a reference fit: hold its voltage and scale, start from its "
                        "centre, rotation and mirror")
    p.add_argument("--robust", action="store_true",
                   help="down-weight outliers and list those rejected")
    p.add_argument("--disk-mrad", type=float, default=None,
                   help="disk radius in mrad for predicting and checking crossings (6; with "
                        "--image, from the detected radius and the scale)")
    p.add_argument("--min-strength", type=float, default=0.1,
                   help="strength threshold of candidate lines for matching (0.1)")
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
    p.set_defaults(run=_cmd_refine)

    p = sub.add_parser("thickness", help="foil thickness from two-beam CBED fringes",
                       description="Foil thickness and extinction distance from the dark "
                                   "fringes of a two-beam CBED disk (Kelly et al. 1975; "
                                   "Allen 1981).")
    p.add_argument("structure", nargs="?",
                   help="CIF file or bundled structure (with --hkl)")
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
    _add_output_options(p)
    p.set_defaults(run=_cmd_thickness)

    p = sub.add_parser("survey", help="rank zone axes by the strain precision they deliver",
                       description="Rank zone axes by the predicted precision of the strain "
                                   "after a reference calibration (centre and rotation free, "
                                   "voltage and scale held).")
    p.add_argument("structure", help="CIF file or bundled structure name")
    p.add_argument("--kv", type=float, default=200.0, help="accelerating voltage in kV (200)")
    p.add_argument("--disk-mrad", type=float, default=6.0,
                   help="convergence semi-angle in mrad (6)")
    p.add_argument("--max-index", type=int, default=7,
                   help="candidates [u v w] with max |index| up to this (7)")
    p.add_argument("--near", nargs=3, type=float, metavar=("U", "V", "W"),
                   help="keep every axis within --max-tilt-deg of this orientation")
    p.add_argument("--max-tilt-deg", type=float, metavar="T", help="holder tilt range")
    p.add_argument("--gmax", type=float, default=4.0, help="largest |g| in 1/A (4)")
    p.add_argument("--min-strength", type=float, default=0.05,
                   help="lines weaker than this are not counted (0.05)")
    p.add_argument("--min-angle-deg", type=float, default=5.0,
                   help="smallest usable crossing angle in degrees (5)")
    p.add_argument("--sigma-mrad", type=float, default=0.005,
                   help="noise of a measured crossing coordinate in mrad (0.005)")
    from .survey import COMPONENTS

    p.add_argument("--component", choices=COMPONENTS,
                   help="rank by this strain component (default: the worst of the six)")
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
                       metavar=("EXX", "EYY", "EZZ", "EYZ", "EXZ", "EXY"))
    state.add_argument("--cell", nargs=6, type=float,
                       metavar=("A", "B", "C", "ALPHA", "BETA", "GAMMA"))
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
    p.add_argument("--min-strength", type=float, default=0.1,
                   help="weaker lines are not drawn (0.1)")
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
    p.add_argument("pattern", help="image file (TIFF, PNG or .npy)")
    p.add_argument("--disk-px", nargs=3, type=float, metavar=("X", "Y", "R"),
                   help="disk centre and radius in px instead of finding it")
    p.add_argument("--min-angle-deg", type=float, default=5.0,
                   help="smallest angle between crossing lines (5)")
    _add_output_options(p)
    p.set_defaults(run=_cmd_detect)

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


def main(argv=None):
    """Entry point of the ``laueline`` console script; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.run(args)
    except InputError as exc:
        sys.stderr.write(f"laueline: error: {exc}\n")
        return EXIT_INPUT
    except FitError as exc:
        sys.stderr.write(f"laueline: fit did not converge: {exc}\n")
        return EXIT_NOT_CONVERGED
    except BrokenPipeError:  # output piped into head or less and closed early
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
