"""Atomic, exclusive writing of outputs (laueline.io.outputs)."""

import csv
import json
import os

import numpy as np
import pytest

from laueline.errors import InputError
from laueline.io.outputs import (OutputPlan, atomic_write, check_outputs, save_figure,
                                 write_csv, write_image, write_json)


def _umask():
    mask = os.umask(0)
    os.umask(mask)
    return mask


def test_json_written_whole_with_file_mode_of_a_plain_open(tmp_path):
    path = tmp_path / "doc.json"
    write_json({"schema": "x/1", "a": np.float64(1.5), "b": np.nan, "c": np.arange(3)}, path)
    # json module of the standard library reads it back; non-finite floats become null
    assert json.loads(path.read_text()) == {"schema": "x/1", "a": 1.5, "b": None,
                                            "c": [0, 1, 2]}
    # POSIX open(2): a created file gets mode 0666 & ~umask
    assert path.stat().st_mode & 0o777 == 0o666 & ~_umask()
    assert os.listdir(tmp_path) == ["doc.json"]


def test_existing_file_kept_without_force_and_replaced_with_it(tmp_path):
    path = tmp_path / "doc.json"
    path.write_text("keep me")
    with pytest.raises(InputError, match="--force"):
        write_json({"a": 1}, path)
    assert path.read_text() == "keep me" and os.listdir(tmp_path) == ["doc.json"]
    write_json({"a": 1}, path, force=True)
    assert json.loads(path.read_text()) == {"a": 1}


def test_failing_writer_leaves_nothing(tmp_path):
    def writer(tmp):
        with open(tmp, "w") as fh:
            fh.write("half")
        raise RuntimeError("encoder failed")

    with pytest.raises(RuntimeError):
        atomic_write(tmp_path / "x.csv", writer)
    assert os.listdir(tmp_path) == []


def test_temporary_beside_target_with_its_suffix(tmp_path):
    seen = []
    atomic_write(tmp_path / "fig.svg", lambda tmp: (seen.append(tmp), open(tmp, "w").close()))
    tmp = seen[0]
    # same folder (so the rename is atomic on one file system), same suffix (writers
    # that choose the format by suffix still see it), hidden name
    assert tmp.parent == tmp_path and tmp.suffix == ".svg" and tmp.name.startswith(".")
    assert not tmp.exists()


def test_csv_read_back_by_the_csv_module(tmp_path):
    path = tmp_path / "t.csv"
    write_csv(path, ["h", "value"], [[1, 0.1], [2, np.float64(1 / 3)]])
    rows = list(csv.reader(open(path, newline="")))
    assert rows[0] == ["h", "value"] and float(rows[2][1]) == pytest.approx(1 / 3, rel=1e-9)


@pytest.mark.parametrize("suffix, magic", [
    (".png", b"\x89PNG\r\n\x1a\n"),  # PNG signature, ISO/IEC 15948 section 5.2
    (".pdf", b"%PDF-"),              # PDF header, ISO 32000-1 section 7.5.2
    (".svg", b"<?xml"),              # XML declaration of an SVG document (W3C SVG 1.1)
])
def test_figure_format_follows_suffix(tmp_path, suffix, magic):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(1, 1))
    fig.add_subplot().plot([0, 1], [0, 1])
    path = tmp_path / f"f{suffix}"
    save_figure(fig, path)
    assert path.read_bytes().startswith(magic)
    assert os.listdir(tmp_path) == [path.name]


def test_images_read_back_by_tifffile_and_numpy(tmp_path):
    import tifffile

    image = np.arange(64 * 48, dtype=float).reshape(48, 64) % 1000
    write_image(tmp_path / "a.tif", image)
    write_image(tmp_path / "a.npy", image)
    np.testing.assert_array_equal(tifffile.imread(tmp_path / "a.tif"), image)
    np.testing.assert_array_equal(np.load(tmp_path / "a.npy"), image)
    assert sorted(os.listdir(tmp_path)) == ["a.npy", "a.tif"]


def test_plan_names_all_outputs_or_none(tmp_path):
    a, b = tmp_path / "a.json", tmp_path / "b.csv"
    plan = OutputPlan([a, b])
    plan.check()
    with plan.active():
        write_json({"x": 1}, a)
        write_csv(b, ["h"], [[1]])
        assert not a.exists() and not b.exists()  # staged, not yet named
        b.write_text("another run got here first\n")
        with pytest.raises(InputError, match="exists"):
            plan.commit()
    # the name already given (a.json) is taken back; the other run's file is untouched
    assert not a.exists() and b.read_text() == "another run got here first\n"
    assert os.listdir(tmp_path) == ["b.csv"]


def test_two_runs_without_force_cannot_overwrite_each_other(tmp_path):
    path = tmp_path / "fit.json"
    first, second = OutputPlan([path]), OutputPlan([path])
    first.check()
    second.check()
    with second.active():
        write_json({"run": 2}, path)
        staged_second = second.staged_path(path)
    assert not staged_second.exists()  # leaving the block discards what was staged
    with first.active():
        write_json({"run": 1}, path)
        first.commit()
    with second.active():
        write_json({"run": 2}, path)
        with pytest.raises(InputError, match="exists"):
            second.commit()
    assert json.loads(path.read_text()) == {"run": 1}
    assert os.listdir(tmp_path) == ["fit.json"]


@pytest.mark.parametrize("paths, message", [
    (["{t}/x.json", "{t}/x.json"], "two outputs"),
    (["{t}/x.json", "{t}/sub/../x.json"], "same output file"),
    (["{t}/sub"], "folder"),
    (["{t}/missing/x.json"], "does not exist"),
    (["{t}/file/x.json"], "not a folder"),
    (["{t}/old.json"], "--force"),
])
def test_check_outputs_refuses(tmp_path, paths, message):
    (tmp_path / "sub").mkdir()
    (tmp_path / "file").write_text("")
    (tmp_path / "old.json").write_text("")
    with pytest.raises(InputError, match=message):
        check_outputs([p.replace("{t}", str(tmp_path)) for p in paths])


def test_check_outputs_refuses_overwriting_an_input(tmp_path):
    src = tmp_path / "points.csv"
    src.write_text("x,y\n")
    with pytest.raises(InputError, match="overwrite the input"):
        check_outputs([src], force=True, inputs=[src])
