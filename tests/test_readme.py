"""The README and examples/README.md run as written; the first hour's promises hold.

The code blocks are read from the files themselves: ```bash blocks are run
command by command (``cd`` changes folder, ``pip`` and ``pytest`` lines are
the installation this test already stands on), ```python blocks are
executed.  Unfenced or ```text blocks are synopses and JSON layouts.
"""

import argparse
import os
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from laueline import __version__
from laueline.cli import build_parser, main

ROOT = Path(__file__).resolve().parents[1]
READMES = [ROOT / "README.md", ROOT / "examples" / "README.md"]
BLOCK = re.compile(r"^```(\w*)[ \t]*\n(.*?)^```[ \t]*$", re.M | re.S)


def code_blocks(path):
    """(language, text) of every fenced block of a Markdown file, in order."""
    return BLOCK.findall(Path(path).read_text(encoding="utf-8"))


def shell_commands(text):
    """Commands of a shell block as argument lists: continuations joined, comments dropped."""
    joined = re.sub(r"\\\n", " ", text)
    commands = []
    for line in joined.splitlines():
        argv = shlex.split(line, comments=True)
        if argv:
            commands.append(argv)
    return commands


def laueline_commands(path):
    return [argv for lang, text in code_blocks(path) if lang == "bash"
            for argv in shell_commands(text) if argv[0] == "laueline"]


def test_readme_opens_with_the_job_then_setup_then_tests():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    first_paragraph = text.split("\n\n")[1]
    assert "strain" in first_paragraph and "CBED" in first_paragraph
    blocks = code_blocks(ROOT / "README.md")
    (lang1, setup), (lang2, tests) = blocks[:2]
    assert lang1 == lang2 == "bash"
    setup_lines = [" ".join(a) for a in shell_commands(setup)]
    # the clone is named in a comment: the block itself runs from the clone's root
    assert "git clone" in setup and "cd laueline" in setup
    for expected in ("python3 -m venv .venv", ". .venv/bin/activate", "pip install .",
                     "laueline demo"):
        assert any(line.startswith(expected) for line in setup_lines), expected
    assert any("pytest" in " ".join(a) for a in shell_commands(tests))
    # The stated Python version is the one pyproject.toml enforces.
    assert "Python 3.10 or newer" in setup
    assert 'requires-python = ">=3.10"' in (ROOT / "pyproject.toml").read_text()


def test_demo_and_virtual_environment_are_ignored_by_git():
    if shutil.which("git") is None or not (ROOT / ".git").exists():
        pytest.skip("not a git checkout")
    for path in ("laueline-demo/channel.tif", ".venv/bin/python"):
        ignored = subprocess.run(["git", "-C", str(ROOT), "check-ignore", "-q", path])
        assert ignored.returncode == 0, f"{path} is not ignored"


@pytest.mark.parametrize("readme", READMES, ids=lambda p: p.relative_to(ROOT).as_posix())
def test_every_command_parses(readme):
    # Fast guard for option typos: every laueline command of the file is
    # accepted by the parser as written.
    commands = laueline_commands(readme)
    assert commands
    parser = build_parser()
    for argv in commands:
        if argv[1:] == ["--version"]:
            continue
        parser.parse_args(argv[1:])


def test_version_flag_in_a_fresh_process():
    out = subprocess.run([sys.executable, "-m", "laueline", "--version"], capture_output=True,
                         text=True, check=True).stdout
    assert out.strip() == f"laueline {__version__}"
    # one version: the package's and the distribution's
    toml = (ROOT / "pyproject.toml").read_text()
    assert re.search(r'^version = "([^"]+)"', toml, re.M).group(1) == __version__


def _subcommands():
    for action in build_parser()._actions:
        if isinstance(action, argparse._SubParsersAction):
            return action.choices
    raise AssertionError("no sub-commands")


def test_every_option_has_help_text():
    missing = [f"{name} {'/'.join(a.option_strings) or a.dest}"
               for name, sub in _subcommands().items() for a in sub._actions
               if not a.help]
    assert missing == []


def test_shared_options_share_their_defaults():
    # The same option means the same thing in every command (common practice
    # of command-line design): --min-strength, --kv, --disk-mrad, --gmax.
    for option in ("min_strength", "kv", "disk_mrad", "gmax", "min_angle_deg"):
        defaults = {}
        for name, sub in _subcommands().items():
            for a in sub._actions:
                if a.dest == option and a.default is not None:
                    defaults[name] = a.default
        assert len(set(defaults.values())) <= 1, (option, defaults)


def _run(argv, capsys):
    """Run one README command in-process; its exit status."""
    try:
        status = main(argv[1:])
    except SystemExit as exc:  # --version and argument errors
        status = exc.code
    out, err = capsys.readouterr()
    assert status == 0, f"{' '.join(argv)} exited {status}: {err.strip()[-300:]}"
    return out


def _run_block(lang, text, cwd, capsys):
    """Run a README block in ``cwd``; returns the folder the block leaves us in."""
    if lang == "python":
        os.chdir(cwd)
        exec(compile(text, "README block", "exec"), {"__name__": "readme"})
        return cwd
    clone = None
    for argv in shell_commands(text):
        if argv[:2] == ["git", "clone"]:
            clone = argv[-1]  # this test already stands in the checkout
            continue
        if argv[0] == "cd":
            cwd = cwd if argv[1] == clone else cwd / argv[1]
            continue
        if argv[0] in ("git", "python3", ".", "source", "pip") or "pytest" in argv:
            continue  # the checkout, environment and installation this test runs in
        assert argv[0] == "laueline", f"unexpected command in the README: {argv}"
        os.chdir(cwd)
        _run(argv, capsys)
    return cwd


@pytest.mark.slow
def test_readme_runs_as_written(tmp_path, capsys, monkeypatch):
    # A fresh checkout in miniature: the examples folder beside the demo's.
    (tmp_path / "examples").symlink_to(ROOT / "examples", target_is_directory=True)
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("MPLBACKEND", "Agg")
    cwd = tmp_path
    for lang, text in code_blocks(ROOT / "README.md"):
        if lang in ("bash", "python"):
            cwd = _run_block(lang, text, cwd, capsys)
    for name in ("cal.json", "fit.json", "fit.png", "survey.png", "survey.json",
                 "strained.tif", "lines.png", "fit-image.json", "thickness.png", "t.json"):
        assert (tmp_path / "laueline-demo" / name).is_file(), name
    # examples/README.md runs from the top of the checkout into the demo's folder.
    for lang, text in code_blocks(ROOT / "examples" / "README.md"):
        if lang == "bash":
            _run_block(lang, text, tmp_path, capsys)
    assert (tmp_path / "laueline-demo" / "scenario-fit.png").is_file()


@pytest.mark.slow
def test_walkthrough_runs(tmp_path, monkeypatch, capsys):
    import runpy

    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("LAUELINE_OUT", str(tmp_path / "figures"))
    runpy.run_path(str(ROOT / "examples" / "walkthrough.py"), run_name="__main__")
    out = capsys.readouterr().out
    assert "effective voltage 198.6" in out  # the scenario's invented 198.6 kV, recovered
    assert (tmp_path / "figures" / "walkthrough-pattern.png").is_file()
