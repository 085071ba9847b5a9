"""Atomic writing of every output file.

A file laueline writes never appears half-written, and none is overwritten
unless the caller asks for it:

* the content goes to a temporary file in the destination folder (named
  ``.NAME.XXXXXX.partial.SUFFIX``, so that writers choosing the format by
  suffix still see it), is flushed and fsynced, and is then given its final
  name in one step;
* without ``force`` the final name is created exclusively (a hard link of the
  finished temporary, which fails if the name exists), so two runs writing
  the same file cannot overwrite each other; with ``force`` the temporary
  replaces the old file (``os.replace``);
* temporary files are removed on every exit path: errors, ``KeyboardInterrupt``
  and any exception a signal handler raises.  Only SIGKILL can leave one
  behind; it is never at the final name.

An :class:`OutputPlan` groups the outputs of one command: it checks them all
before any work starts (distinct names, folders that exist and accept files,
no folder in the way, nothing existing without ``force``), stages every file
as a temporary while the command runs, and gives them their names together
at the end, so a command that fails half way leaves nothing behind.  While a
plan is active (``with plan.active():``), :func:`write_json`,
:func:`write_csv`, :func:`save_figure` and :func:`write_image` stage the
paths the plan holds instead of committing them at once.
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import math
import os
import tempfile
from pathlib import Path

import numpy as np

from ..errors import InputError

__all__ = [
    "FIGURE_SUFFIXES",
    "OutputPlan",
    "atomic_write",
    "check_outputs",
    "json_ready",
    "json_text",
    "save_figure",
    "write_csv",
    "write_image",
    "write_json",
    "write_text",
]

FIGURE_SUFFIXES = (".png", ".svg", ".pdf")

#: Marker in the names of temporary files (``.NAME.XXXXXX.partial.SUFFIX``).
TEMPORARY_MARK = ".partial"

#: Longest file name most file systems accept (POSIX NAME_MAX on Linux).
_NAME_MAX = 255

_UMASK = os.umask(0)
os.umask(_UMASK)

_ACTIVE_PLANS: list = []


# ---------------------------------------------------------------------------
# checks
# ---------------------------------------------------------------------------

def _probe_folder(folder):
    """Raise InputError unless a file can be created in ``folder``."""
    try:
        fd, probe = tempfile.mkstemp(prefix=".laueline-probe.", dir=folder)
    except OSError as exc:
        raise InputError(f"cannot write into folder {folder}: {exc.strerror}") from None
    os.close(fd)
    os.unlink(probe)


def check_outputs(paths, force=False, figure=None, inputs=()):
    """Check, before any work, that every output can be written.

    Parameters
    ----------
    paths : iterable of str or Path or None
        Output files (None entries are skipped).
    force : bool
        Existing files may be replaced.
    figure : str or Path, optional
        A figure path; its suffix must be one of :data:`FIGURE_SUFFIXES`.
    inputs : iterable of str or Path or None
        Input files, which no output may name.

    Raises
    ------
    InputError
        Two outputs name the same file, an output names an input or a folder,
        its folder is missing or refuses new files, or it exists and
        ``force`` is false.
    """
    try:
        _check_outputs(paths, force, figure, inputs)
    except OSError as exc:  # a name the file system refuses outright (too long, ...)
        raise InputError(f"cannot write {exc.filename or ''}: {exc.strerror}") from None


def _check_outputs(paths, force, figure, inputs):
    items = [Path(p) for p in paths if p is not None] + ([Path(figure)] if figure else [])
    seen = {}
    probed = set()
    for path in items:
        if len(os.fsencode(path.name)) > _NAME_MAX:
            raise InputError(f"cannot write {path}: the file name is longer than {_NAME_MAX} "
                             "bytes")
        key = os.path.realpath(path)
        if key in seen:
            same = (f"{path} is named for two outputs" if str(seen[key]) == str(path)
                    else f"{seen[key]} and {path} name the same output file")
            raise InputError(f"{same}; give each output its own name")
        seen[key] = path
        if path.name in ("", ".", "..") or str(path).endswith(os.sep):
            raise InputError(f"cannot write {path}: it names a folder, not a file")
        if path.is_dir():
            raise InputError(f"cannot write {path}: it is a folder")
        parent = path.parent
        if not parent.exists():
            raise InputError(f"cannot write {path}: folder {parent} does not exist")
        if not parent.is_dir():
            raise InputError(f"cannot write {path}: {parent} is not a folder")
        if (path.exists() or path.is_symlink()) and not force:
            raise InputError(f"{path} exists; pass --force to overwrite it")
        if path.exists() and not path.is_file():
            raise InputError(f"cannot write {path}: it exists and is not a regular file "
                             "(a device, pipe or socket is never replaced)")
        folder = os.path.realpath(parent)
        if folder not in probed:
            _probe_folder(parent)
            probed.add(folder)
    for source in inputs:
        if source is None:
            continue
        key = os.path.realpath(source)
        if key in seen and Path(source).exists():
            raise InputError(f"output {seen[key]} would overwrite the input {source}")
    if figure is not None and Path(figure).suffix.lower() not in FIGURE_SUFFIXES:
        raise InputError(f"figure {figure}: the suffix must be one of "
                         f"{', '.join(FIGURE_SUFFIXES)}")


# ---------------------------------------------------------------------------
# the atomic primitive
# ---------------------------------------------------------------------------

def _temporary_beside(path):
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.",
                               suffix=TEMPORARY_MARK + path.suffix, dir=path.parent)
    os.close(fd)
    # mkstemp creates the file private (0600); give it the mode a plain open would
    os.chmod(tmp, 0o666 & ~_UMASK)
    return Path(tmp)


def _fsync_file(path):
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_folder(folder):
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:  # some platforms cannot open folders; the rename is still atomic
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _remove_quietly(path):
    with contextlib.suppress(FileNotFoundError):
        os.unlink(path)


def _stage(path, writer):
    """Write ``writer(tmp)`` into a synced temporary beside ``path``; return its path."""
    path = Path(path)
    try:
        tmp = _temporary_beside(path)
    except FileNotFoundError:
        raise InputError(f"cannot write {path}: folder {path.parent} does not exist") from None
    except OSError as exc:
        raise InputError(f"cannot write {path}: {exc.strerror}") from None
    try:
        writer(tmp)
        _fsync_file(tmp)
    except OSError as exc:
        _remove_quietly(tmp)
        raise InputError(f"cannot write {path}: {exc.strerror or exc}") from None
    except BaseException:
        _remove_quietly(tmp)
        raise
    return tmp


def _publish(tmp, path, force):
    """Give the finished temporary ``tmp`` the name ``path`` (exclusively unless ``force``)."""
    try:
        if force:
            os.replace(tmp, path)
        else:
            try:
                os.link(tmp, path)
            except FileExistsError:
                raise
            except OSError:
                # a file system without hard links: reserve the name, then replace it
                os.close(os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o666))
                os.replace(tmp, path)
    except FileExistsError:
        raise InputError(f"{path} exists (created while this command ran); pass --force "
                         "to overwrite it") from None
    except IsADirectoryError:
        raise InputError(f"cannot write {path}: it is a folder") from None
    except OSError as exc:
        raise InputError(f"cannot write {path}: {exc.strerror or exc}") from None
    finally:
        _remove_quietly(tmp)
    _fsync_folder(Path(path).parent)


def atomic_write(path, writer, force=False):
    """Write a file through ``writer(temporary_path)`` and give it its name atomically.

    Parameters
    ----------
    path : str or Path
        Final file name.  Its folder must exist.
    writer : callable
        Called with the path of an empty temporary file in the same folder
        and with the same suffix; it writes the whole content there.
    force : bool
        Replace an existing file; otherwise the name is created exclusively
        and an existing file raises :class:`~laueline.errors.InputError`.

    Notes
    -----
    When an :class:`OutputPlan` holding ``path`` is active, the file is only
    staged; the plan names it on :meth:`OutputPlan.commit`.
    """
    path = Path(path)
    for plan in reversed(_ACTIVE_PLANS):
        if plan.holds(path):
            plan.stage(path, writer)
            return path
    if not force and (path.exists() or path.is_symlink()):
        raise InputError(f"{path} exists; pass --force to overwrite it")
    if path.is_dir():
        raise InputError(f"cannot write {path}: it is a folder")
    tmp = _stage(path, writer)
    _publish(tmp, path, force)
    return path


# ---------------------------------------------------------------------------
# writers
# ---------------------------------------------------------------------------

def json_ready(value):
    """``value`` with numpy types converted and non-finite floats as None (JSON null)."""
    if isinstance(value, dict):
        return {k: json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if isinstance(value, np.ndarray):
        return json_ready(value.tolist())
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, (np.floating, float)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def write_text(path, text, force=False):
    """Write UTF-8 text atomically."""
    def writer(tmp):
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)

    return atomic_write(path, writer, force)


def _json_default(value):
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    if isinstance(value, np.bool_):
        return bool(value)
    raise TypeError(f"{type(value).__name__} is not JSON serialisable")


def json_text(document):
    """JSON text of a document: numpy values converted, non-finite numbers as null.

    One pass through the C encoder, compact separators; only a document
    holding a NaN or an infinity is cleaned first (a second pass).
    """
    try:
        return json.dumps(document, separators=(",", ":"), allow_nan=False,
                          default=_json_default)
    except ValueError:
        return json.dumps(json_ready(document), separators=(",", ":"), allow_nan=False)


def write_json(document, path, force=False):
    """Write a JSON document (numpy values converted, non-finite -> null) atomically."""
    return write_text(path, json_text(document) + "\n", force)


def _csv_cell(v):
    if isinstance(v, (float, np.floating)):
        return f"{float(v):.10g}"
    return v


def write_csv(path, header, rows, force=False):
    """Write a CSV table with a header row atomically."""
    buffer = io.StringIO(newline="")
    out = csv.writer(buffer)
    out.writerow(header)
    out.writerows([_csv_cell(v) for v in row] for row in rows)
    return write_text(path, buffer.getvalue(), force)


def save_figure(fig, path, force=False, dpi=150):
    """Save a matplotlib figure atomically; the format follows the suffix of ``path``."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in FIGURE_SUFFIXES:
        raise InputError(f"figure {path}: the suffix must be one of "
                         f"{', '.join(FIGURE_SUFFIXES)}")
    return atomic_write(path, lambda tmp: fig.savefig(tmp, format=suffix[1:], dpi=dpi,
                                                     facecolor=fig.get_facecolor()), force)


def write_image(path, image, force=False):
    """Write a pattern image atomically (format by suffix, see
    :func:`laueline.images.io.write_image`)."""
    from ..images.io import IMAGE_SUFFIXES
    from ..images.io import write_image as encode

    path = Path(path)
    if path.suffix.lower() not in IMAGE_SUFFIXES:
        raise InputError(f"{path}: unsupported image type '{path.suffix}'; use "
                         f"{', '.join(IMAGE_SUFFIXES)}")
    return atomic_write(path, lambda tmp: encode(tmp, image, force=True), force)


# ---------------------------------------------------------------------------
# plans
# ---------------------------------------------------------------------------

class OutputPlan:
    """All outputs of one command: checked first, staged while it runs, named at the end.

    Parameters
    ----------
    paths : iterable of str or Path or None
        The output files (None entries skipped); more can be added with
        :meth:`add` before :meth:`check`.
    force : bool
        Existing files may be replaced.

    Examples
    --------
    >>> plan = OutputPlan(["fit.json", "fit.png"], force=False)   # doctest: +SKIP
    >>> plan.check()                                              # doctest: +SKIP
    >>> with plan.active():                                       # doctest: +SKIP
    ...     write_json(document, "fit.json")      # staged
    ...     save_figure(fig, "fit.png")           # staged
    ...     plan.commit()                         # both named, or neither
    """

    def __init__(self, paths=(), force=False):
        self.force = bool(force)
        self._paths = {}
        self._staged = {}
        self.add(*paths)

    def add(self, *paths):
        """Register further output files."""
        for p in paths:
            if p is not None:
                self._paths.setdefault(os.path.abspath(p), Path(p))

    @property
    def paths(self):
        """The registered output files, in registration order."""
        return list(self._paths.values())

    def holds(self, path):
        return os.path.abspath(path) in self._paths

    def check(self, figure=None, inputs=()):
        """Check every registered output (see :func:`check_outputs`)."""
        figures = [p for p in self.paths if figure is not None
                   and os.path.abspath(p) == os.path.abspath(figure)]
        check_outputs([p for p in self.paths if p not in figures], self.force,
                      figures[0] if figures else None, inputs=inputs)

    def stage(self, path, writer):
        """Write ``path``'s content into its temporary now; it is named at :meth:`commit`."""
        key = os.path.abspath(path)
        if key not in self._paths:
            raise InputError(f"{path} is not an output of this command")
        previous = self._staged.pop(key, None)
        if previous is not None:
            _remove_quietly(previous)
        self._staged[key] = _stage(Path(path), writer)

    def staged_path(self, path):
        """The temporary holding the staged content of ``path`` (to read it back)."""
        return self._staged[os.path.abspath(path)]

    def commit(self):
        """Give every staged file its final name; on a failure undo the names given."""
        named = []
        try:
            for key in list(self._staged):
                tmp = self._staged[key]
                path = self._paths[key]
                _publish(tmp, path, self.force)
                del self._staged[key]
                if not self.force:
                    named.append(path)
        except BaseException:
            for path in named:  # created exclusively by this plan: safe to remove
                _remove_quietly(path)
            self.discard()
            raise

    def discard(self):
        """Remove every staged temporary (nothing is named)."""
        for tmp in self._staged.values():
            _remove_quietly(tmp)
        self._staged.clear()

    @contextlib.contextmanager
    def active(self):
        """Within this block the module's writers stage the plan's paths."""
        _ACTIVE_PLANS.append(self)
        try:
            yield self
        finally:
            _ACTIVE_PLANS.remove(self)
            self.discard()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.discard()
        return False
