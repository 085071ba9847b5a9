"""Bad input across every command: one line, the right exit status, nothing written.

Each case runs the command line in-process in a folder of its own, holding
the inputs it may name, and asserts that the command ends with exit status 2
and a single line on stderr (no traceback) and that no file in the folder
was created, removed or changed.  The promise checked is the project's
contract for bad input (README, "Files and errors").

The interruption tests start real writing processes and stop them with
SIGINT, SIGTERM and SIGKILL.
"""

import hashlib
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from laueline.cli import main

SRC = str(Path(__file__).resolve().parents[1] / "src")

CELL = ("data_x\n_cell_length_a {a}\n_cell_length_b {b}\n_cell_length_c {c}\n"
        "_cell_angle_alpha {al}\n_cell_angle_beta {be}\n_cell_angle_gamma {ga}\n"
        "_symmetry_space_group_name_H-M '{sg}'\n")
SITES = ("loop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n"
         "_atom_site_fract_y\n_atom_site_fract_z\n_atom_site_occupancy\n"
         "_atom_site_U_iso_or_equiv\n")


def cif(sites="Si1 Si 0 0 0 1 0.006\n", a=5.43, b=5.43, c=5.43, al=90, be=90, ga=90,
        sg="F d -3 m:1"):
    return CELL.format(a=a, b=b, c=c, al=al, be=be, ga=ga, sg=sg) + SITES + sites


ANISO = ("loop_\n_atom_site_aniso_label\n_atom_site_aniso_U_11\n_atom_site_aniso_U_22\n"
         "_atom_site_aniso_U_33\n_atom_site_aniso_U_12\n_atom_site_aniso_U_13\n"
         "_atom_site_aniso_U_23\nSi1 -0.01 0.01 0.01 0 0 0\n")

#: Bad CIF contents, written as {name}.cif in the case folder.
CIFS = {
    "empty": "",
    "prose": "this is not a CIF at all\n",
    "nocell": "data_x\n_atom_site_label A\n",
    "noatoms": CELL.format(a=4, b=4, c=4, al=90, be=90, ga=90, sg="P 1"),
    "element": cif("Q1 Qq 0 0 0 1 0.01\n"),
    "angles150": cif(al=150, be=150, ga=150, sg="P 1"),
    "angles_sum": cif(al=60, be=60, ga=170, sg="P 1"),
    "angle0": cif(al=0, sg="P 1"),
    "angle180": cif(ga=180, sg="P 1"),
    "length0": cif(a=0, sg="P 1"),
    "length_neg": cif(b=-4, sg="P 1"),
    "length_unknown": cif(c="?", sg="P 1"),
    "length_text": cif(a="abc", sg="P 1"),
    "coord_unknown": cif("Si1 Si ? 0 0 1 0.006\n", sg="P 1"),
    "coord_dot": cif("Si1 Si 0 . 0 1 0.006\n", sg="P 1"),
    "coord_text": cif("Si1 Si 0 0 zero 1 0.006\n", sg="P 1"),
    "coord_huge": cif("Si1 Si 1e300 0 0 1 0.006\n", sg="P 1"),
    "occ3": cif("Si1 Si 0 0 0 3 0.006\n"),
    "occ_neg": cif("Si1 Si 0 0 0 -1 0.006\n"),
    "occ_text": cif("Si1 Si 0 0 0 full 0.006\n"),
    "occ_zero": cif("Si1 Si 0 0 0 0 0.006\n"),
    "length_tiny": cif(a=0.001, sg="P 1"),
    "huge_cell": cif(a=9999, sg="P 1"),
    "u_neg": cif("Si1 Si 0 0 0 1 -0.1\n"),
    "u_huge": cif("Si1 Si 0 0 0 1 5\n"),
    "b_neg": cif().replace("_atom_site_U_iso_or_equiv", "_atom_site_B_iso_or_equiv")
                  .replace("1 0.006", "1 -20"),
    "aniso_neg": cif("Si1 Si 0 0 0 1 0.006\n") + ANISO,
    "overfull": cif("Si1 Si 0 0 0 1 0.006\nGe1 Ge 0 0 0 1 0.006\n"),
    "two_blocks": cif() + "\n" + cif().replace("data_x", "data_y"),
    "bad_group": cif(sg="Q 9 z"),
}


def _files(folder):
    """Path -> (size, digest, mtime) of every file below ``folder``."""
    out = {}
    for root, dirs, files in os.walk(folder):
        for name in files + dirs:
            p = Path(root) / name
            if p.is_file():
                data = p.read_bytes()
                out[str(p.relative_to(folder))] = (len(data), hashlib.sha1(data).hexdigest(),
                                                   p.stat().st_mtime_ns)
            else:
                out[str(p.relative_to(folder)) + "/"] = None
    return out


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    """A folder with the inputs and obstacles the cases name (shared: every case
    checks that it leaves the folder exactly as it found it)."""
    t = tmp_path_factory.mktemp("fuzz")
    for name, text in CIFS.items():
        (t / f"{name}.cif").write_text(text, encoding="utf-8")
    (t / "good.cif").write_text(cif())
    (t / "pts.csv").write_text("x,y\n100,120\n130,90\n")
    (t / "latin1.csv").write_bytes("x,y\n1,2\n# caf\xe9\n".encode("latin-1"))
    (t / "utf16.json").write_bytes('{"schema": "laueline.fit/1"}'.encode("utf-16"))
    (t / "wrong.json").write_text('{"schema": "laueline.pattern/1"}')
    (t / "notjson.json").write_text("{not json")
    (t / "deep.json").write_text("[" * 100000 + "]" * 100000)
    (t / "stiff.txt").write_text("1 2 3\n")
    (t / "exists.json").write_text("keep me\n")
    (t / "exists.png").write_text("keep me\n")
    (t / "exists.tif").write_text("keep me\n")
    (t / "exists-crossings.csv").write_text("keep me\n")
    (t / "fresh.truth.json").write_text("keep me\n")
    (t / "img.npy").write_bytes(b"\x93NUMPY")
    (t / "afile").write_text("a file, not a folder\n")
    (t / "adir").mkdir()
    (t / "olddemo").mkdir()
    (t / "olddemo" / "channel-fit.png").write_text("keep me\n")
    return t


PREDICT = ["predict", "Si", "--zone", "1", "1", "0", "--json", "{t}/out.json"]
REFINE = ["refine", "Si", "--zone", "2", "3", "0", "--x-axis", "0", "0", "4", "--points",
          "{t}/pts.csv", "--json", "{t}/out.json"]
THICK = ["thickness", "--d-spacing-A", "2", "--separation-px", "100", "--fringes-px", "10",
         "20", "30", "40", "--json", "{t}/out.json"]
SURVEY = ["survey", "Si", "--max-index", "2", "--json", "{t}/out.json"]
RENDER = ["render", "Si", "--zone", "1", "1", "0", "--size", "64", "64", "--out",
          "{t}/fresh.png"]
DETECT = ["detect", "{t}/img.npy", "--json", "{t}/out.json"]


def _numbers(base, option, *values):
    return [base + [option, *v.split()] for v in values]


CASES = (
    # -- predict: every numeric option --------------------------------------------
    _numbers(PREDICT, "--kv", "nan", "inf", "-inf", "-200", "0", "0.001", "1e7", "abc")
    + _numbers(PREDICT, "--disk-mrad", "nan", "0", "-3", "1e9")
    + _numbers(PREDICT, "--gmax", "nan", "0", "-1", "100", "inf")
    + _numbers(PREDICT, "--min-strength", "nan", "-0.1", "1e3")
    + _numbers(PREDICT, "--min-angle-deg", "nan", "-5", "90")
    + _numbers(PREDICT, "--b-iso", "nan", "-20", "1e6")
    + _numbers(PREDICT, "--strain", "nan 0 0 0 0 0", "-1 0 0 0 0 0", "0 0 0 0 0 inf",
               "0 0 0")
    + _numbers(PREDICT, "--cell", "0 5 5 90 90 90", "5 5 5 150 150 150", "5 5 5 nan 90 90",
               "-5 5 5 90 90 90", "5 5 5 90 90 0")
    + [["predict", "Si", "--zone", *z.split(), "--json", "{t}/out.json"]
       for z in ("0 0 0", "1 1", "a b c", "1000 0 0", "1.5 0 0")]
    + _numbers(PREDICT, "--x-axis", "0 0 0", "1 0 0")
    + [PREDICT + ["--strain", *"0 0 0 0 0 0".split(), "--cell", *"5 5 5 90 90 90".split()]]
    # -- predict: outputs -----------------------------------------------------------
    + [["predict", "Si", "--zone", "1", "1", "0", "--json", "{t}/x.png", "--figure",
        "{t}/x.png"],
       ["predict", "Si", "--zone", "1", "1", "0", "--csv", "{t}/t.csv", "--json",
        "{t}/t-crossings.csv"],
       ["predict", "Si", "--zone", "1", "1", "0", "--json", "{t}/adir"],
       ["predict", "Si", "--zone", "1", "1", "0", "--json", "{t}/adir/"],
       ["predict", "Si", "--zone", "1", "1", "0", "--json", "{t}/missing/x.json"],
       ["predict", "Si", "--zone", "1", "1", "0", "--json", "{t}/afile/x.json"],
       ["predict", "Si", "--zone", "1", "1", "0", "--json", "{t}/exists.json"],
       ["predict", "Si", "--zone", "1", "1", "0", "--figure", "{t}/exists.png"],
       ["predict", "Si", "--zone", "1", "1", "0", "--csv", "{t}/exists.csv"],
       ["predict", "Si", "--zone", "1", "1", "0", "--json", "{t}/out.json", "--figure",
        "{t}/p.gif"],
       ["predict", "Si", "--zone", "1", "1", "0", "--figure", "{t}/noext"],
       ["predict", "{t}/good.cif", "--zone", "1", "1", "0", "--json", "{t}/good.cif",
        "--force"],
       PREDICT + ["--mark-crossings"],
       PREDICT + ["--unknown-option"],
       ["predict", "--zone", "1", "1", "0"],
       ]
    # -- structures: bad CIF files, blocks, names -------------------------------------
    + [["predict", f"{{t}}/{name}.cif", "--zone", "1", "1", "0", "--json", "{t}/out.json"]
       for name in CIFS]
    + [["predict", "{t}/two_blocks.cif", "--block", "z", "--zone", "1", "1", "0"],
       ["predict", "{t}/good.cif", "--block", "nope", "--zone", "1", "1", "0"],
       ["predict", "{t}/adir", "--zone", "1", "1", "0"],
       ["predict", "Unobtainium", "--zone", "1", "1", "0"],
       ["render", "{t}/angles150.cif", "--zone", "1", "1", "0", "--out", "{t}/fresh.png"],
       ["survey", "{t}/coord_unknown.cif", "--max-index", "2"],
       ["refine", "{t}/occ3.cif", "--zone", "1", "1", "0", "--points", "{t}/pts.csv"],
       ["thickness", "{t}/b_neg.cif", "--hkl", "2", "2", "0", "--separation-px", "100",
        "--fringes-px", "10", "20", "30"],
       ["thickness", "{t}/two_blocks.cif", "--hkl", "2", "2", "0", "--separation-px", "100",
        "--fringes-px", "10", "20", "30"],
       ]
    # -- refine ------------------------------------------------------------------------
    + _numbers(REFINE, "--match-mrad", "0", "-1", "nan", "inf")
    + _numbers(REFINE, "--rotation-deg", "nan", "inf", "1e9")
    + _numbers(REFINE, "--center-px", "nan nan", "1e9 0", "0 -inf")
    + _numbers(REFINE, "--scale-px-per-mrad", "nan", "0", "-40", "inf")
    + _numbers(REFINE, "--kv", "nan", "0.001")
    + _numbers(REFINE, "--disk-mrad", "-1", "nan")
    + _numbers(REFINE, "--min-strength", "500", "nan")
    + _numbers(REFINE, "--min-angle-deg", "-1")
    + _numbers(REFINE, "--cubic-elastic-GPa", "nan 1 1", "1e9 1 1")
    + _numbers(REFINE, "--disk-px", "1 2 3")
    + _numbers(REFINE, "--model", "bogus")
    + _numbers(REFINE, "--calibration", "{t}/latin1.csv", "{t}/utf16.json", "{t}/wrong.json",
               "{t}/notjson.json", "{t}/missing.json", "{t}/adir", "{t}/deep.json")
    + _numbers(REFINE, "--stiffness-GPa", "{t}/latin1.csv", "{t}/missing.txt", "{t}/stiff.txt")
    + _numbers(REFINE, "--sample-x", "1 0 0", "0 0 0")
    + [["refine", "Si", "--zone", "2", "3", "0", "--points", p, "--json", "{t}/out.json"]
       for p in ("{t}/latin1.csv", "{t}/missing.csv", "{t}/adir")]
    + [REFINE[:-2] + ["--json", "{t}/pts.csv", "--force"],
       REFINE[:-2] + ["--json", "{t}/exists.json"],
       REFINE + ["--sample-x", "0", "0", "0", "--sample-z", "0", "0", "1"],
       REFINE + ["--calibration", "{t}/wrong.json", "--kv", "300"],
       ["refine", "Si", "--zone", "2", "3", "0"],
       ]
    # -- thickness ---------------------------------------------------------------------
    + _numbers(THICK, "--kv", "1e-7", "nan")
    + _numbers(THICK, "--first-index", "0", "-1")
    + _numbers(THICK, "--position-sigma-px", "-1", "nan", "0")
    + [["thickness", "--d-spacing-A", d, "--separation-px", "100", "--fringes-px", "10", "20"]
       for d in ("0.001", "0", "-2", "nan", "inf")]
    + [["thickness", "--d-spacing-A", "2", "--separation-px", s, "--fringes-px", "10", "20"]
       for s in ("0", "-100", "nan")]
    + [["thickness", "--d-spacing-A", "2", "--separation-px", "100", "--fringes-px", *f.split()]
       for f in ("10 nan", "-10 20", "inf 20")]
    + [["thickness", "Si", "--hkl", "2", "2", "0", "--d-spacing-A", "2", "--separation-px",
        "100", "--fringes-px", "10", "20", "30"],
       ["thickness", "Si", "--d-spacing-A", "2", "--separation-px", "100", "--fringes-px",
        "10", "20", "30"],
       THICK + ["--b-iso", "0.5"],
       THICK + ["--block", "x"],
       ["thickness", "--d-spacing-A", "2", "--profile", "{t}/latin1.csv"],
       ["thickness", "--d-spacing-A", "2", "--profile", "{t}/missing.csv"],
       ["thickness", "--d-spacing-A", "2", "--profile", "{t}/adir"],
       ["thickness", "--d-spacing-A", "2", "--profile", "{t}/pts.csv", "--position-sigma-px",
        "1"],
       ["thickness", "--separation-px", "100", "--fringes-px", "10", "20"],
       ["thickness", "Si", "--hkl", "0", "0", "0", "--separation-px", "100", "--fringes-px",
        "10", "20"],
       THICK[:-2] + ["--json", "{t}/exists.json"],
       ]
    # -- survey ------------------------------------------------------------------------
    + _numbers(SURVEY, "--max-index", "0", "-3", "1000")
    + _numbers(SURVEY, "--sigma-mrad", "0", "-0.005", "nan")
    + _numbers(SURVEY, "--max-tilt-deg", "nan", "0")
    + _numbers(SURVEY, "--top", "0", "-1")
    + _numbers(SURVEY, "--kv", "nan")
    + _numbers(SURVEY, "--disk-mrad", "0")
    + _numbers(SURVEY, "--gmax", "inf")
    + _numbers(SURVEY, "--component", "bogus")
    + _numbers(SURVEY, "--figure", "{t}/s.gif")
    + [SURVEY + ["--near", "0", "0", "0", "--max-tilt-deg", "10"],
       SURVEY + ["--near", "1", "1", "0"]]
    # -- render ------------------------------------------------------------------------
    + _numbers(RENDER, "--seed", "-1", "1e3")
    + _numbers(RENDER, "--dose", "1e30", "-5", "nan")
    + _numbers(RENDER, "--scale-px-per-mrad", "0", "nan", "-1")
    + _numbers(RENDER, "--center-px", "1e6 1e6", "600 10", "nan 5", "-1 10")
    + [["render", "Si", "--zone", "1", "1", "0", "--size", *s.split(), "--out",
        "{t}/fresh.png"] for s in ("0 0", "10 10", "100000 100000", "-5 5")]
    + _numbers(RENDER, "--line-width-mrad", "0")
    + _numbers(RENDER, "--line-depth", "2")
    + _numbers(RENDER, "--blur-px", "-1")
    + _numbers(RENDER, "--background-tilt", "5")
    + _numbers(RENDER, "--background-angle-deg", "nan")
    + _numbers(RENDER, "--rotation-deg", "inf")
    + [["render", "Si", "--zone", "1", "1", "0", "--out", o]
       for o in ("{t}/r.gif", "{t}/exists.tif", "{t}/fresh.tif", "{t}/adir",
                 "{t}/missing/r.tif")]
    + [RENDER + ["--strain", "0", "0", "0", "0", "0", "0", "--cell", "5", "5", "5", "90", "90",
                 "90"]]
    # -- detect (outputs and numbers; reading images is tested with the images) -------
    + _numbers(DETECT, "--min-angle-deg", "nan")
    + _numbers(DETECT, "--disk-px", "1 2 nan", "100 100 0", "100 100 -5")
    + [DETECT[:-2] + ["--json", "{t}/exists.json"],
       DETECT + ["--figure", "{t}/d.gif"],
       DETECT[:2] + ["--json", "{t}/img.npy", "--force"]]
    # -- demo, structures, the command itself ---------------------------------------------
    + [["demo", "--out", "{t}/afile"],
       ["demo", "--out", "{t}/missing/deeper"],
       ["demo", "--out", "{t}/olddemo"],
       ["structures", "--bogus"],
       [],
       ["bogus-command"],
       ]
)


def _argv(case, t):
    return [a.replace("{t}", str(t)) for a in case]


def test_enough_cases():
    assert len(CASES) >= 150


@pytest.mark.parametrize("case", CASES, ids=[" ".join(c)[:70] for c in CASES])
def test_bad_input(case, folder, capsys):
    before = _files(folder)
    try:
        code = main(_argv(case, folder))
    except SystemExit as exc:  # argument errors leave through argparse
        code = exc.code
    out, err = capsys.readouterr()
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2, (code, err)
    assert len(lines) == 1 and lines[0].startswith("laueline:"), err
    assert "Traceback" not in err
    assert _files(folder) == before


def test_large_structure_refused_cleanly(tmp_path, capsys):
    """A 13,824-atom cell (a 12 x 12 x 12 silicon supercell in P 1): read without a
    quadratic pair search, then refused by the reflection limits before the work."""
    base = np.array([[0, 0, 0], [0, .5, .5], [.5, 0, .5], [.5, .5, 0], [.25, .25, .25],
                     [.25, .75, .75], [.75, .25, .75], [.75, .75, .25]])
    n = 12
    shifts = np.stack(np.meshgrid(*[np.arange(n)] * 3, indexing="ij"), -1).reshape(-1, 1, 3)
    sites = ((base + shifts) / n).reshape(-1, 3)
    rows = "".join(f"Si{i} Si {x:.6f} {y:.6f} {z:.6f} 1 0.006\n"
                   for i, (x, y, z) in enumerate(sites))
    big = tmp_path / "big.cif"
    big.write_text(cif(rows, a=5.431 * n, b=5.431 * n, c=5.431 * n, sg="P 1"))
    assert len(sites) == 13824
    code = main(["predict", str(big), "--zone", "1", "1", "0", "--json",
                 str(tmp_path / "out.json")])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "limit" in err, err
    assert not (tmp_path / "out.json").exists()


def _library_calls():
    from laueline import read_crystal
    from laueline.images.render import RenderSettings, render_pattern
    from laueline.lines import predict
    from laueline.points import Points
    from laueline.refine import refine
    from laueline.thickness import thickness_from_fringes

    si = read_crystal("Si")
    pts = Points(np.array([[100.0, 120.0], [130.0, 90.0]]))
    return [
        (lambda: predict(si, (1, 1, 0), 200, 6, min_strength=float("nan")), "min_strength"),
        (lambda: predict(si, (1, 1, 0), 0.001, 6), "kv"),
        (lambda: thickness_from_fringes([10, 20, 30], 100, d_spacing_A=0.001), "d_spacing_A"),
        (lambda: thickness_from_fringes([10, 20, 30], 100, d_spacing_A=2,
                                        first_fringe_index=0), "first_fringe_index"),
        (lambda: thickness_from_fringes([10, 20, 30], 100, d_spacing_A=2, fringes_sigma=-1),
         "fringes_sigma"),
        (lambda: refine(si, (2, 3, 0), pts, match_mrad=0), "match_mrad"),
        (lambda: refine(si, (2, 3, 0), pts, rotation_deg=float("nan")), "rotation_deg"),
        (lambda: render_pattern(si, (1, 1, 0), 200, 6, RenderSettings(seed=-1)), "seed"),
        (lambda: render_pattern(si, (1, 1, 0), 200, 6, RenderSettings(scale_px_per_mrad=0)),
         "scale_px_per_mrad"),
        (lambda: render_pattern(si, (1, 1, 0), 200, 6, RenderSettings(dose=1e30)), "dose"),
    ]


def test_library_refuses_the_same_values_naming_the_parameter():
    from laueline.errors import InputError

    for call, name in _library_calls():
        with pytest.raises(InputError, match=name):
            call()


def test_reader_closing_the_pipe_loses_no_file(tmp_path, monkeypatch):
    """``laueline predict ... --json x | head -1``: the text is cut, the file is whole."""
    import io
    import json

    fd = os.open(os.devnull, os.O_WRONLY)

    class ClosedPipe(io.StringIO):
        def write(self, text):
            raise BrokenPipeError(32, "Broken pipe")

        def fileno(self):
            return fd

    monkeypatch.setattr(sys, "stdout", ClosedPipe())
    path = tmp_path / "p.json"
    try:
        code = main(["predict", "Si", "--zone", "1", "1", "0", "--json", str(path)])
    finally:
        os.close(fd)
    assert code == 0 and json.loads(path.read_text())["schema"] == "laueline.pattern/1"


# ---------------------------------------------------------------------------
# interruption
# ---------------------------------------------------------------------------

def test_signal_during_writing_in_process(tmp_path, capsys, monkeypatch):
    """A signal arriving while the outputs are being written leaves none of them."""
    import laueline.io.outputs as outputs

    handlers = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    real = outputs._fsync_file
    for signum, status in [(signal.SIGINT, 130), (signal.SIGTERM, 143)]:
        calls = []

        def interrupted(path, signum=signum, calls=calls):
            real(path)
            calls.append(path)
            if len(calls) == 2:  # one file is staged, the next one is being written
                os.kill(os.getpid(), signum)

        monkeypatch.setattr(outputs, "_fsync_file", interrupted)
        code = main(["predict", "Si", "--zone", "1", "1", "0", "--json",
                     str(tmp_path / "p.json"), "--csv", str(tmp_path / "p.csv")])
        err = capsys.readouterr().err
        assert code == status, err
        assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
        assert os.listdir(tmp_path) == []
    assert {s: signal.getsignal(s) for s in handlers} == handlers  # restored afterwards


# A real laueline process whose writing is held open after the first file is
# staged, so that the test knows it is interrupting a write (not timing-based).
_HELD_WRITER = """
import sys, time
import laueline.io.outputs as outputs
real = outputs._fsync_file
def held(path):
    real(path)
    print("writing", flush=True)
    time.sleep(60)
outputs._fsync_file = held
from laueline.cli import main
sys.exit(main(sys.argv[1:]))
"""

_RENDER = ["render", "Si", "--zone", "1", "1", "0", "--size", "64", "64", "--out"]


def _run(folder, argv, held):
    env = {**os.environ, "PYTHONPATH": SRC}
    head = [sys.executable, "-c", _HELD_WRITER] if held else \
        [sys.executable, "-m", "laueline.cli"]
    return subprocess.Popen(head + argv, cwd=folder, env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)


def test_killed_while_writing(tmp_path):
    """Stop processes in the middle of writing an image and its truth file with
    SIGINT, SIGTERM and SIGKILL: no partial output (after SIGINT or SIGTERM no
    temporary either, and one line on stderr); the next run without --force
    succeeds.  The three run side by side."""
    cases = [(signal.SIGINT, 130), (signal.SIGTERM, 143), (signal.SIGKILL, -signal.SIGKILL)]
    runs = []
    for signum, status in cases:
        folder = tmp_path / signal.Signals(signum).name
        folder.mkdir()
        runs.append((folder, signum, status, _run(folder, _RENDER + [str(folder / "r.tif")],
                                                  held=True)))
    for folder, signum, _, proc in runs:
        for line in proc.stdout:
            if line.strip() == "writing":
                break
        assert any(".partial" in n for n in os.listdir(folder))  # a write is under way
        proc.send_signal(signum)
    for folder, signum, status, proc in runs:
        _, err = proc.communicate(timeout=60)
        names = os.listdir(folder)
        assert proc.returncode == status, err
        assert "r.tif" not in names and "r.truth.json" not in names
        if signum != signal.SIGKILL:
            assert names == [], names
            lines = err.strip().splitlines()
            assert len(lines) == 1 and "no output written" in lines[0], err
        else:  # SIGKILL cannot be caught: a temporary may remain, never the final name
            assert names and all(".partial" in n for n in names)
            rerun = _run(folder, _RENDER + [str(folder / "r.tif")], held=False)
            _, err = rerun.communicate(timeout=120)
            assert rerun.returncode == 0, err
            assert {"r.tif", "r.truth.json"} <= set(os.listdir(folder))
