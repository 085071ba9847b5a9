"""The refine command: patterns files, constraints, four-index input, y-up calibrations."""

import json

import numpy as np
import pytest
from conftest import DETECTOR, ewald_points, run_cli, synthetic_points

from laueline import read_crystal
from laueline.crystal import basis_from_cell
from laueline.errors import InputError
from laueline.fit.indices import direction_from_four, direction_to_four, plane_from_four
from laueline.points import write_points

E = [1.2e-3, -0.8e-3, 0.5e-3, 0.6e-3, -0.4e-3, 0.3e-3]
ZONES = [((2, 3, 0), (0, 0, 4)), ((0, 2, 3), (4, 0, 0)), ((3, 0, 2), (0, 4, 0))]


# -- Miller-Bravais ------------------------------------------------------------------

def test_four_index_directions_against_the_hexagonal_vectors():
    # [U V T W] is the vector U a1 + V a2 + T a3 + W c with a3 = -(a1 + a2)
    # (Frank, Acta Cryst. 18 (1965) 862); it must be parallel to A [u v w]
    A = basis_from_cell(3.2094, 3.2094, 5.2108, 90, 90, 120)
    a1, a2, c = A.T
    a3 = -(a1 + a2)
    for four in [(1, 1, -2, 0), (1, 0, -1, 0), (2, -1, -1, 3), (0, 0, 0, 1), (1, -2, 1, 6)]:
        U, V, T, W = four
        vec = U * a1 + V * a2 + T * a3 + W * c
        three = A @ np.array(direction_from_four(four), float)
        assert np.linalg.norm(np.cross(vec, three)) < 1e-12 * np.linalg.norm(vec) ** 2
        assert vec @ three > 0
        back = np.array(direction_to_four(direction_from_four(four)))
        ratio = np.array(four) @ back / (back @ back)
        assert ratio > 0 and np.array_equal(ratio * back, four)  # same direction, reduced
    # the four-index zone law hU + kV + iT + lW = 0 (Frank 1965) holds in three indices
    plane = (1, -1, 0, 3)
    zone = (1, 1, -2, 0)
    assert np.dot(plane, zone) == 0
    assert np.dot(plane_from_four(plane), direction_from_four(zone)) == 0
    with pytest.raises(InputError, match=r"i = -\(h \+ k\)"):
        plane_from_four((1, -1, 1, 3))
    with pytest.raises(InputError, match=r"T = -\(U \+ V\)"):
        direction_from_four((1, 1, -1, 0))


def test_hexagonal_cli_four_index(tmp_path, capsys):
    mg = read_crystal("Mg")
    pts = synthetic_points(mg, (2, 1, 0), n=30, x_axis=(0, 0, 2))
    path = tmp_path / "mg.csv"
    rows = ["x,y,h1,k1,i1,l1,h2,k2,i2,l2"]
    for (x, y), a, b in zip(pts.xy_px, pts.hkl_a, pts.hkl_b):
        rows.append(f"{x},{y},{a[0]},{a[1]},{-(a[0] + a[1])},{a[2]},"
                    f"{b[0]},{b[1]},{-(b[0] + b[1])},{b[2]}")
    path.write_text("\n".join(rows) + "\n")
    code, out, err = run_cli(capsys, "refine", "Mg", "--zone", 1, 0, -1, 0, "--x-axis",
                             0, 0, 0, 2, "--points", path, "--model", "hexagonal")
    assert code == 0, err
    assert "[1 0 -1 0]" in out
    code, out, err = run_cli(capsys, "refine", "Mg", "--zone", 1, 0, -2, 0, "--points", path)
    assert code == 2 and "T = -(U + V)" in err and len(err.strip().splitlines()) == 1
    bad = tmp_path / "bad.csv"
    bad.write_text(path.read_text().replace(f",{-(pts.hkl_a[0][0] + pts.hkl_a[0][1])},",
                                            ",9,", 1))
    code, out, err = run_cli(capsys, "refine", "Mg", "--zone", 1, 0, -1, 0, "--points", bad)
    assert code == 2 and "i = -(h + k)" in err


# -- y-up point files with a calibration ------------------------------------------------

def test_y_up_calibration_round_trip(tmp_path, capsys):
    # a calibration made from y-up points must serve y-up points of the
    # strained region (the failure "point 1 lies 13.8 mrad from the centre")
    si = read_crystal("Si")
    rng = np.random.default_rng(8)
    for name, strain in (("ref", None), ("strained", E)):
        pts = synthetic_points(si, (2, 3, 0), strain=strain, noise_px=0.05, rng=rng)
        xy = pts.xy_px * [1, -1] + [0, 512]  # y counted upward from the bottom row
        write_points(tmp_path / f"{name}.csv", xy, pts.hkl_a, pts.hkl_b)
    cal = tmp_path / "cal.json"
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", 2, 3, 0, "--x-axis", 0, 0, 4,
                             "--points", tmp_path / "ref.csv", "--y-up", "--model", "fixed",
                             "--free", "kv", "--json", cal)
    assert code == 0, err
    doc = json.loads(cal.read_text())
    assert doc["detector"]["y_up"] is True
    # the centre is reported as the user counts it (y up)
    assert doc["detector"]["center_px"][1] == pytest.approx(512 - DETECTOR.center_px[1],
                                                            abs=0.05)
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", 2, 3, 0, "--x-axis", 0, 0, 4,
                             "--points", tmp_path / "strained.csv", "--y-up",
                             "--calibration", cal, "--json", tmp_path / "fit.json")
    assert code == 0, err
    fit = json.loads((tmp_path / "fit.json").read_text())
    assert fit["success"] and fit["rms_px"] < 0.2


# -- patterns files ----------------------------------------------------------------------

@pytest.fixture()
def patterns_dir(tmp_path):
    si = read_crystal("Si")
    rng = np.random.default_rng(5)
    items = []
    for k, (zone, x_axis) in enumerate(ZONES):
        det = DETECTOR.replace(rotation_deg=17.0 + 30 * k)
        pts = ewald_points(si, zone, x_axis, E, det, noise_px=0.1, rng=rng)
        write_points(tmp_path / f"p{k}.csv", pts.xy_px, pts.hkl_a, pts.hkl_b)
        cal = {"schema": "laueline.fit/1", "kv": 200.0,
               "detector": {**det.as_dict(), "y_up": False}}
        (tmp_path / f"cal{k}.json").write_text(json.dumps(cal))
        items.append({"zone": list(zone), "x_axis": list(x_axis), "points": f"p{k}.csv",
                      "calibration": f"cal{k}.json"})
    (tmp_path / "patterns.json").write_text(json.dumps({"patterns": items}))
    return tmp_path, items


def test_patterns_file(patterns_dir, capsys):
    folder, _ = patterns_dir
    out_json = folder / "fit.json"
    code, out, err = run_cli(capsys, "refine", "Si", "--patterns", folder / "patterns.json",
                             "--json", out_json)
    assert code == 0, err
    doc = json.loads(out_json.read_text())
    assert doc["success"] and len(doc["patterns"]) == 3
    for p in doc["patterns"]:
        assert {"zone", "detector", "rms_px", "points", "line_residuals"} <= set(p)
    assert "residuals by line" in out and "correlations of the strain" in out
    names = {c["name"] for c in doc["checks"]}
    assert {"converged", "chi_square_p_value", "largest_normalised_residual"} & names


def _edit(folder, items, k, **changes):
    edited = [dict(it) for it in items]
    edited[k].update(changes)
    path = folder / f"edited-{len(list(folder.glob('edited-*')))}.json"
    path.write_text(json.dumps({"patterns": edited}))
    return path


def test_patterns_bad_input(patterns_dir, capsys):
    folder, items = patterns_dir
    cases = [
        (_edit(folder, items, 1, structure="Ge"), [], "one crystal"),
        (_edit(folder, items, 0, tilt_deg=[0, 0]), [], "every pattern"),
        (_edit(folder, items, 2, zone=[1, 1, -2, 0]), [], "four-index"),
        (folder / "patterns.json", ["--fix-strain", "exx", "eyy", "ezz", "eyz", "exz", "exy"],
         "nothing to fit"),
        (folder / "patterns.json", ["--fix-strain", "exx=1e-3", "eyy=0", "--biaxial",
                                    "--sample-x", 1, 0, 0, "--sample-z", 0, 0, 1],
         "contradict"),
        (folder / "patterns.json", ["--zero-normal-stress", "--sample-x", 1, 0, 0,
                                    "--sample-z", 0, 0, 1], "--cubic-elastic-GPa"),
    ]
    for path, extra, message in cases:
        code, out, err = run_cli(capsys, "refine", "Si", "--patterns", path, *extra)
        assert code == 2, (message, err)
        assert len(err.strip().splitlines()) == 1 and message in err, err
    # tilt readings that cannot all bring their zones to the beam
    tilted = [dict(it, tilt_deg=[5.0 * k, 0.0]) for k, it in enumerate(items)]
    (folder / "tilted.json").write_text(json.dumps({"patterns": tilted}))
    code, out, err = run_cli(capsys, "refine", "Si", "--patterns", folder / "tilted.json")
    assert code == 2 and "from the beam" in err


def test_implausible_fit_exits_3_and_still_writes(tmp_path, capsys):
    # stated sigmas three times too small (0.1 px stated, 0.3 px scatter): the
    # chi-square check fails (p far below 0.01 for ~75 degrees of freedom)
    si = read_crystal("Si")
    pts = ewald_points(si, (2, 3, 0), (0, 0, 4), E, DETECTOR, noise_px=0.3,
                       rng=np.random.default_rng(4))
    path = tmp_path / "p.csv"
    write_points(path, pts.xy_px, pts.hkl_a, pts.hkl_b, sigma_px=0.1)
    cal = tmp_path / "cal.json"
    cal.write_text(json.dumps({"schema": "laueline.fit/1", "kv": 200.0,
                               "detector": {**DETECTOR.as_dict(), "y_up": False}}))
    out_json = tmp_path / "fit.json"
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", 2, 3, 0, "--x-axis", 0, 0, 4,
                             "--points", path, "--calibration", cal, "--json", out_json)
    assert code == 3 and len(err.strip().splitlines()) == 1
    assert "implausible" in err and "chi square" in err
    doc = json.loads(out_json.read_text())
    assert not doc["success"] and not doc["plausible"]  # implausible: success false


# -- split lines in an image: the single-strain fit says so ---------------------------

def test_refine_image_warns_of_split_lines(tmp_path, capsys):
    # lines split by surface relaxation, drawn from excitation errors and the
    # quadrature profile of a depth-varying displacement (tests/test_relaxation.py)
    from test_relaxation import ZONE as RELAX_ZONE
    from test_relaxation import _render_split

    from laueline.detector import Detector

    si = read_crystal("Si")
    detector = Detector((257.4, 253.8), 0.42 * 512 / 6, 12.0, False)
    image = _render_split(si, np.array([1.5e-3, -0.5e-3, 1.0e-3, 0.0, 0.0, 0.3e-3]),
                          np.array([0.04, 0.012]), 100.0, 400.0, detector)
    np.save(tmp_path / "p.npy", image)
    cal = tmp_path / "cal.json"
    cal.write_text(json.dumps({"schema": "laueline.fit/1", "kv": 200.0,
                               "detector": detector.as_dict()}))
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", *RELAX_ZONE, "--image",
                             tmp_path / "p.npy", "--calibration", cal)
    assert code in (0, 3), err
    assert "split" in out and "laueline relaxation" in out
