"""Result objects that read well in a notebook.

:class:`ResultMixin` gives a result class (usually a dataclass declared with
``repr=False``) five methods from four small hooks it defines itself:

==========================  ===============================================
hook                        gives
==========================  ===============================================
``_summary() -> str``       ``repr()``: the class name and a short summary
``_document() -> dict``     ``to_dict()`` (what the JSON file holds) and
                            ``to_json(path)``
``_tables() -> dict``       ``to_dataframe(name)``: ``{name: (header,
                            rows)}``, the first table being the default
``_figure(**kw) -> Figure`` ``plot(**kw)``: a matplotlib Figure
==========================  ===============================================

The JSON text is made by :func:`laueline.report.json_text`, so
``json.loads(result.to_json_text())`` equals the file the command line
writes.  pandas is optional (``pip install "laueline[tables]"``); without
it :meth:`ResultMixin.to_dataframe` says how to get it.
"""

from __future__ import annotations

__all__ = ["ResultMixin", "format_indices"]


def format_indices(values):
    """Signed integers separated by spaces: ``(6, 5, -5) -> '6 5 -5'``.

    The one index format of laueline's text; figures draw bars over negative
    indices instead (:func:`laueline.plot.hkl_label`).
    """
    return " ".join(str(int(v)) for v in values)


class ResultMixin:
    """Short ``repr``, ``to_dict``, ``to_json``, ``to_dataframe`` and ``plot``."""

    def _summary(self):  # pragma: no cover - every user defines it
        raise NotImplementedError

    def _document(self):  # pragma: no cover
        raise NotImplementedError

    def _tables(self):
        return {}

    def _figure(self, **kwargs):  # pragma: no cover
        raise NotImplementedError(f"{type(self).__name__} has no figure")

    def __repr__(self):
        return f"<{type(self).__name__}: {self._summary()}>"

    def _repr_pretty_(self, printer, cycle):
        # IPython and Jupyter print this instead of a dataclass dump
        printer.text(repr(self))

    def to_dict(self):
        """The result as the JSON document the command line writes (plain Python values)."""
        return self._document()

    def to_json_text(self):
        """The JSON text of :meth:`to_dict` (compact, non-finite numbers as null)."""
        from .report import json_text

        return json_text(self._document())

    def to_json(self, path, force=False):
        """Write :meth:`to_dict` to ``path``; an existing file only with ``force``."""
        from .report import write_json

        write_json(self._document(), path, force)

    @property
    def table_names(self):
        """Names accepted by :meth:`to_dataframe`."""
        return tuple(self._tables())

    def to_dataframe(self, table=None):
        """A table of the result as a :class:`pandas.DataFrame`.

        Parameters
        ----------
        table : str, optional
            One of :attr:`table_names`; the first by default.  The columns
            are those of the CSV the command line writes.
        """
        from .errors import InputError

        tables = self._tables()
        if not tables:
            raise InputError(f"{type(self).__name__} has no tables")
        name = next(iter(tables)) if table is None else table
        if name not in tables:
            raise InputError(f"table must be one of {', '.join(tables)}; got {name!r}")
        try:
            import pandas as pd
        except ImportError:
            raise ImportError("to_dataframe needs pandas: pip install "
                              "\"laueline[tables]\" (or pip install pandas)") from None
        header, rows = tables[name]
        return pd.DataFrame(list(rows), columns=list(header))

    def plot(self, **kwargs):
        """A matplotlib :class:`~matplotlib.figure.Figure` of the result.

        Keyword arguments go to the figure function; a notebook shows the
        returned figure, ``fig.savefig(path)`` writes it.
        """
        return self._figure(**kwargs)
