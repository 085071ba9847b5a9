"""Exceptions shared by the library and the command line.

`InputError` marks a problem the user can cause and mend (a malformed CIF,
an impossible zone axis, a CSV with missing columns, a degenerate fit).  The
command line turns it into one line on stderr and exit status 2.  Anything
else escaping the library is a bug.
"""


class InputError(ValueError):
    """Bad input: the message is a single sentence meant for the user."""


class FitError(RuntimeError):
    """A fit that ran but did not converge to a trustworthy answer."""
