"""The command line: outputs, contracts and bad input."""

import csv
import json

import pytest

from laueline.cli import main


def run(capsys, *argv):
    """Run the CLI in-process; argument errors exit through SystemExit."""
    try:
        code = main([str(a) for a in argv])
    except SystemExit as exc:
        code = exc.code
    out, err = capsys.readouterr()
    return code, out, err


def test_predict_writes_json_csv_and_figure(tmp_path, capsys):
    js, cs, fig = tmp_path / "p.json", tmp_path / "p.csv", tmp_path / "p.png"
    code, out, err = run(capsys, "predict", "Si", "--zone", 2, 3, 0, "--json", js,
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
    code, out, err = run(capsys, "predict", "Si", "--zone", 1, 1, 0, "--json", js)
    assert code == 2 and "--force" in err and js.read_text() == "keep me"
    code, _, _ = run(capsys, "predict", "Si", "--zone", 1, 1, 0, "--json", js, "--force")
    assert code == 0 and json.loads(js.read_text())["schema"] == "laueline.pattern/1"


def test_structures_lists_all(capsys):
    from laueline.crystal import bundled_structures

    code, out, _ = run(capsys, "structures")
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
    code, out, err = run(capsys, "predict", *argv)
    assert code == 2
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("laueline: error:"), err
    assert not out_json.exists()
