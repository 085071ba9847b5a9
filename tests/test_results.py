"""Results in a notebook: repr, to_dict, tables and figures agree with the command line."""

import json

import numpy as np
import pytest

import laueline
from laueline.errors import InputError

from conftest import run_cli


@pytest.fixture(scope="module")
def pattern():
    return laueline.predict(laueline.read_crystal("Si"), [2, 3, 0], 200, 6.0)


def test_to_dict_is_the_json_the_command_writes(pattern, tmp_path, capsys):
    path = tmp_path / "p.json"
    code, _, _ = run_cli(capsys, "predict", "Si", "--zone", 2, 3, 0, "--json", path)
    assert code == 0
    from_cli = json.loads(path.read_text())
    assert json.loads(json.dumps(pattern.to_dict())) == from_cli
    assert json.loads(pattern.to_json_text()) == from_cli
    # and the document holds the arrays themselves, not a summary of them
    assert np.allclose(np.array(from_cli["lines"][3]["points_mrad"]), pattern.points_mrad[3])


def test_repr_is_one_short_line(pattern):
    text = repr(pattern)
    assert "\n" not in text and len(text) < 160
    assert text.startswith("<Pattern: Si [2 3 0], 200 kV")
    assert f"{pattern.n_lines} lines" in text and f"{pattern.n_crossings} crossings" in text


def test_tables_as_dataframes(pattern):
    pd = pytest.importorskip("pandas")
    lines = pattern.to_dataframe()
    assert isinstance(lines, pd.DataFrame)
    assert len(lines) == pattern.n_lines
    assert list(lines[["h", "k", "l"]].iloc[0]) == list(pattern.hkl[0])
    crossings = pattern.to_dataframe("crossings")
    assert len(crossings) == pattern.n_crossings
    with pytest.raises(InputError, match="table must be one of lines, crossings"):
        pattern.to_dataframe("rings")


def test_plot_returns_a_figure(pattern):
    from matplotlib.figure import Figure

    fig = pattern.plot(n_labels=4)
    assert isinstance(fig, Figure)
    assert all(ax.get_xlabel() and ax.get_ylabel() for ax in fig.axes)


def test_to_json_keeps_the_no_overwrite_rule(pattern, tmp_path):
    path = tmp_path / "p.json"
    pattern.to_json(path)
    with pytest.raises(InputError, match="exists"):
        pattern.to_json(path)
    pattern.to_json(path, force=True)
    assert json.loads(path.read_text())["schema"] == "laueline.pattern/1"


def test_non_finite_numbers_become_null():
    # JSON (RFC 8259) has no NaN or infinity; the writer turns them into null.
    from laueline.report import json_text

    doc = {"a": np.array([1.0, np.nan]), "b": np.float32(np.inf), "c": np.int64(3),
           "d": (np.bool_(True), 2.5)}
    assert json.loads(json_text(doc)) == {"a": [1.0, None], "b": None, "c": 3,
                                          "d": [True, 2.5]}


def test_package_names_load_lazily_and_functions_win_over_modules():
    import subprocess
    import sys

    code = ("import sys, laueline; before = 'numpy' in sys.modules; "
            "import laueline.survey; from laueline.refine import MODELS; "
            "print(before, callable(laueline.survey), callable(laueline.refine))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["False", "True", "True"]
    assert set(laueline.__all__) <= set(dir(laueline))


def test_fit_figure_explains_itself(si):
    # Structure of the figure, not numbers: fitted loci drawn thin and half
    # transparent over the data, a key arrow for the residual magnification,
    # labelled axes with units on every panel.
    from matplotlib.collections import LineCollection
    from matplotlib.quiver import QuiverKey

    from conftest import DETECTOR, synthetic_points
    from laueline.plot import fit_figure
    from laueline.refine import refine

    rng = np.random.default_rng(3)
    points = synthetic_points(si, [2, 3, 0], n=30, noise_px=0.2, rng=rng)
    fit = refine(si, [2, 3, 0], points, model="fixed", x_axis=(0, 0, 4),
                 scale_px_per_mrad=DETECTOR.scale_px_per_mrad)
    fig = fit_figure(fit, si)
    ax = fig.axes[0]
    loci = [c for c in ax.collections if isinstance(c, LineCollection)]
    assert loci and all(c.get_alpha() is not None and c.get_alpha() < 1 for c in loci)
    keys = [a for a in ax.get_children() if isinstance(a, QuiverKey)]
    assert len(keys) == 1 and "drawn" in keys[0].text.get_text()
    assert "px" in ax.get_xlabel() and "px" in ax.get_ylabel()


def test_predict_figure_marks_crossings_only_when_asked(pattern):
    plain = pattern.plot()
    marked = pattern.plot(show_crossings=True, n_labels=6)
    count = [sum(len(line.get_xdata()) for line in fig.axes[0].get_lines()
                 if line.get_marker() not in (None, "None", "")) for fig in (plain, marked)]
    assert count[0] == 0
    # and then sparingly: only crossings among the labelled lines (at most 6 choose 2)
    assert 0 < count[1] <= 15 < pattern.n_crossings


def test_labels_sit_on_their_lines(pattern):
    # Every index label of the disk panel is placed on a vertex of the locus
    # it names (the label is the line's, not a neighbour's).
    from laueline.plot import hkl_label

    fig = pattern.plot(n_labels=8)
    texts = {t.get_text(): t.get_position() for t in fig.axes[0].texts}
    strongest = np.argsort(-pattern.strength, kind="stable")[:8]
    for i in strongest:
        position = np.array(texts[hkl_label(pattern.hkl[i])])
        distance = np.min(np.linalg.norm(pattern.points_mrad[i] - position, axis=1))
        assert distance < 1e-9  # a vertex of the polyline, exactly
