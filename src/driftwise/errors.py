"""Error types shared by every module.

`InputError` is anything the user can fix (a bad file, a bad option, a foreign
model file).  The command line prints it as one line and exits with status 2;
every other exception is an internal error (status 1).
"""

from __future__ import annotations


class InputError(ValueError):
    """A problem with what the user gave us, stated in one actionable sentence."""
