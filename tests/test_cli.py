"""The command line: outputs, contracts and bad input."""

import csv
import json

import pytest
from conftest import run_cli



def test_predict_writes_json_csv_and_figure(tmp_path, capsys):
    js, cs, fig = tmp_path / "p.json", tmp_path / "p.csv", tmp_path / "p.png"
    code, out, err = run_cli(capsys, "predict", "Si", "--zone", 2, 3, 0, "--json", js,
                         "--csv", cs, "--figure", fig)
    assert code == 0, err
    assert "wavelength" in out and "rings" in out
    doc = json.loads(js.read_text())
    assert doc["schema"] == "laueline.pattern/1"
    for key in ["structure", "beam", "zone", "x_axis", "strain", "lines", "crossings",
                "rings", "max_convergence_mrad", "warnings"]:
        assert key in doc
    assert doc["structure"]["space_group"] == {"number": 227, "symbol": "F d -3 m:2"}
    line = doc["lines"][0]
    for key in ["hkl", "laue_zone", "g_inv_A", "f_abs", "strength", "normal",
                "offset_mrad", "points_mrad"]:
        assert key in line
    assert len(line["points_mrad"]) >= 50
    i, j = doc["crossings"][0]["lines"]
    assert 0 <= i < len(doc["lines"]) and 0 <= j < len(doc["lines"])
    rows = list(csv.DictReader(open(cs)))
    assert len(rows) == len(doc["lines"])
    crossing_rows = list(csv.DictReader(open(tmp_path / "p-crossings.csv")))
    assert len(crossing_rows) == len(doc["crossings"])
    assert fig.stat().st_size > 10_000


def test_no_overwrite_without_force(tmp_path, capsys):
    js = tmp_path / "p.json"
    js.write_text("keep me")
    code, out, err = run_cli(capsys, "predict", "Si", "--zone", 1, 1, 0, "--json", js)
    assert code == 2 and "--force" in err and js.read_text() == "keep me"
    code, _, _ = run_cli(capsys, "predict", "Si", "--zone", 1, 1, 0, "--json", js, "--force")
    assert code == 0 and json.loads(js.read_text())["schema"] == "laueline.pattern/1"


def test_structures_lists_all(capsys):
    from laueline.crystal import bundled_structures

    code, out, _ = run_cli(capsys, "structures")
    assert code == 0
    for name in bundled_structures():
        assert name in out


def _cif(tmp_path, text):
    p = tmp_path / "x.cif"
    p.write_text(text)
    return p


CELL = ("data_x\n_cell_length_a 4\n_cell_length_b 4\n_cell_length_c 4\n"
        "_cell_angle_alpha 90\n_cell_angle_beta 90\n_cell_angle_gamma 90\n")


@pytest.mark.parametrize("args", [
    ["{cif:}", "--zone", 1, 1, 0],
    ["{cif:data_x\n_cell_length_a 'oops\n}", "--zone", 1, 1, 0],
    ["{cif:data_x\n_atom_site_label A\n}", "--zone", 1, 1, 0],
    ["{cif:" + CELL + "}", "--zone", 1, 1, 0],
    ["Unobtainium", "--zone", 1, 1, 0],
    ["Si", "--zone", 0, 0, 0],
    ["Si", "--zone", 1, 1, 0, "--x-axis", 1, 0, 0],
    ["Si", "--zone", 1, 1, 0, "--kv", -5],
    ["Si", "--zone", 1, 1, 0, "--disk-mrad", 0],
    ["Si", "--zone", 1, 1, 0, "--gmax", 100],
    ["Si", "--zone", 1, 1, 0, "--strain", -1, 0, 0, 0, 0, 0],
    ["Si", "--zone", 1, 1, 0, "--figure", "{tmp}/p.gif"],
    ["Si", "--zone", 1, 1, 0, "--json", "{tmp}/missing/p.json"],
    ["Si", "--zone", 1, 1],
    ["Si", "--zone", "a", 1, 1],
])
def test_bad_input_one_line_exit_2_nothing_written(tmp_path, capsys, args):
    argv = []
    for a in args:
        a = str(a)
        if a.startswith("{cif:"):
            a = str(_cif(tmp_path, a[5:-1]))
        argv.append(a.replace("{tmp}", str(tmp_path)))
    out_json = tmp_path / "out.json"
    if "--json" not in argv:
        argv += ["--json", str(out_json)]
    code, out, err = run_cli(capsys, "predict", *argv)
    assert code == 2
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("laueline: error:"), err
    assert not out_json.exists()


# -- refine -----------------------------------------------------------------

@pytest.fixture()
def crossing_files(tmp_path):
    """Reference (197.3 kV) and strained point files, labelled and not."""
    import numpy as np
    from conftest import synthetic_points

    from laueline import read_crystal
    from laueline.points import write_points

    si = read_crystal("Si")
    rng = np.random.default_rng(2)
    out = {}
    for name, kv, strain in [("ref", 197.3, None), ("strained", 197.3,
                                                     [1e-3, -5e-4, 2e-3, 0, 0, 1e-4])]:
        pts = synthetic_points(si, (2, 3, 0), kv=kv, strain=strain, noise_px=0.1, rng=rng)
        out[name] = tmp_path / f"{name}.csv"
        write_points(out[name], pts.xy_px, pts.hkl_a, pts.hkl_b)
        out[name + "-bare"] = tmp_path / f"{name}-bare.csv"
        write_points(out[name + "-bare"], pts.xy_px)
    return out


def test_calibration_workflow(tmp_path, capsys, crossing_files):
    cal, fit, fig = tmp_path / "cal.json", tmp_path / "fit.json", tmp_path / "fit.png"
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", 2, 3, 0, "--kv", 200, "--points",
                         crossing_files["ref"], "--model", "fixed", "--free", "kv",
                         "--x-axis", 0, 0, 4, "--json", cal)
    assert code == 0, err
    doc = json.loads(cal.read_text())
    assert doc["schema"] == "laueline.fit/2" and doc["success"]
    assert doc["kv"] == pytest.approx(197.3, abs=0.02)  # 0.1 px noise, sigma ~ 0.001 kV
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", 2, 3, 0, "--points",
                         crossing_files["strained-bare"], "--calibration", cal,
                         "--x-axis", 0, 0, 4, "--cubic-elastic-GPa", 165.7, 63.9, 79.6,
                         "--json", fit, "--figure", fig)
    assert code == 0, err
    assert "caution" in out and "relaxes" in out and "dynamical" in out
    doc = json.loads(fit.read_text())
    for key in ["model", "zone", "x_axis", "reference_cell", "cell", "cell_sigma", "kv",
                "kv_sigma", "detector", "strain", "stress_GPa", "stress_sigma_GPa",
                "parameters", "correlation", "points", "rms_px", "n_points", "n_used",
                "warnings"]:
        assert key in doc
    assert doc["kv"] == pytest.approx(json.loads(cal.read_text())["kv"])  # held
    assert doc["kv_sigma"] is None and "scale" not in doc["parameters"]
    assert doc["strain"]["frame"] == "reference-cartesian"
    assert set(doc["detector"]["sigma"]) >= {"center_px", "scale_px_per_mrad", "rotation_deg"}
    point = doc["points"][0]
    assert set(point) >= {"x_px", "y_px", "hkl_a", "hkl_b", "residual_px", "used"}
    assert fig.stat().st_size > 10_000


def _write(tmp_path, text):
    p = tmp_path / "pts.csv"
    p.write_text(text)
    return p


@pytest.mark.parametrize("text", [
    "u,v\n1,2\n3,4\n",                                    # missing x, y
    "x,y,area\n1,2,3\n4,5,6\n",                           # extra column
    "x,y\n1,abc\n",                                       # non-numeric
    "x,y\n1,nan\n2,3\n",                                  # NaN
    "x,y,h1,k1,l1\n1,2,1,1,1\n",                          # incomplete labels
    "x,y\n",                                              # header only
    "",                                                   # empty
])
def test_refine_bad_points_file(tmp_path, capsys, text):
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", 2, 3, 0, "--points",
                         _write(tmp_path, text), "--scale-px-per-mrad", 40)
    assert code == 2
    assert len(err.strip().splitlines()) == 1 and err.startswith("laueline: error:")


def test_refine_bad_requests(tmp_path, capsys, crossing_files):
    base = ["refine", "Si", "--zone", 2, 3, 0, "--x-axis", 0, 0, 4, "--points"]
    wrong = tmp_path / "wrong.json"
    wrong.write_text('{"schema": "laueline.pattern/1"}')
    few = tmp_path / "few.csv"
    few.write_text("\n".join(crossing_files["ref"].read_text().splitlines()[:4]) + "\n")
    cases = [
        (base + [crossing_files["ref"], "--free", "kv"], "same way"),
        (base + [crossing_files["ref"], "--calibration", wrong], "schema"),
        (base + [few], "observations"),
        (base + [crossing_files["ref-bare"]], "scale"),
        (base + [crossing_files["ref"], "--center-px", 5000, 5000, "--scale-px-per-mrad", 40],
         "outside"),
        (base + [crossing_files["ref"], "--hold", "foo"], "cannot hold"),
    ]
    for argv, message in cases:
        code, out, err = run_cli(capsys, *argv)
        assert code == 2, (argv, err)
        assert len(err.strip().splitlines()) == 1 and message in err, err


def test_refine_not_converged_exits_3(tmp_path, capsys, crossing_files, monkeypatch):
    import scipy.optimize

    real = scipy.optimize.least_squares

    def stalled(*args, **kwargs):
        res = real(*args, **{**kwargs, "max_nfev": 1})
        res.status = 0
        return res

    monkeypatch.setattr(scipy.optimize, "least_squares", stalled)
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", 2, 3, 0, "--x-axis", 0, 0, 4,
                         "--points", crossing_files["strained"])
    assert code == 3 and "did not converge" in err
