"""The one exception type that carries a problem with the user's input."""

from __future__ import annotations


class InputError(Exception):
    """A problem with the user's input, explained in one line.

    The message names the file, column or row at fault and what to do about
    it. The command line prints it without a traceback and exits with status 2;
    library users can catch it like any other exception.
    """
