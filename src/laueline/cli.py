"""Command line: ``laueline COMMAND ...``.

A thin shell: it parses arguments, calls the library, prints text and writes
files.  Errors the user can cause end with one line on stderr and exit
status 2; a fit that runs but does not converge exits with status 3.
"""

from __future__ import annotations

import argparse
import sys

from .errors import FitError, InputError

EXIT_INPUT = 2
EXIT_NOT_CONVERGED = 3


class _Parser(argparse.ArgumentParser):
    """Argument errors as a single line, exit status 2."""

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
    report.check_outputs([args.json, *csv_paths], args.force, args.figure)
    crystal = _load_crystal(args)
    if args.cell is not None:
        crystal = crystal.with_cell(*args.cell)
    pattern = predict(crystal, args.zone, args.kv, args.disk_mrad, x_axis=args.x_axis,
                      gmax=args.gmax, min_strength=args.min_strength,
                      min_angle_deg=args.min_angle_deg, strain=args.strain,
                      inner_potential=args.inner_potential)
    print(report.pattern_text(pattern))
    if args.json:
        report.write_json(report.pattern_document(pattern), args.json, args.force)
    if args.csv:
        (lh, lr), (ch, cr) = report.pattern_tables(pattern)
        report.write_csv(csv_paths[0], lh, lr, args.force)
        report.write_csv(csv_paths[1], ch, cr, args.force)
    if args.figure:
        from .plot import pattern_figure, save_figure

        save_figure(pattern_figure(pattern, show_crossings=args.mark_crossings), args.figure)
    written = [p for p in (args.json, *csv_paths, args.figure) if p]
    if written:
        print("\nwrote " + ", ".join(str(p) for p in written))
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
                     description="HOLZ deficit lines in CBED patterns: predict, fit, survey.")
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
    _add_output_options(p, csv=True)
    p.add_argument("--mark-crossings", action="store_true", help="mark crossings in the figure")
    p.set_defaults(run=_cmd_predict)

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
