"""The exceptions that carry a problem for users: with their input, or with the engine."""

from __future__ import annotations


class InputError(Exception):
    """A problem with the user's input, explained in one line.

    The message names the file, column, row or setting at fault and what to do
    about it. The command line prints it without a traceback and exits with
    status 2; library users can catch it like any other exception.

    Parameters
    ----------
    message : str
        The one line.
    setting : str, optional
        The library name of the setting at fault (a settings field such as
        ``min_participation``), when the message begins with it; the command
        line then names the flag instead (``--min-participation``).
    """

    def __init__(self, message: str, setting: str | None = None) -> None:
        super().__init__(message)
        self.setting = setting

    def worded_for(self, flag_prefix: str = "--") -> str:
        """Return the message with its leading setting name written as a command-line flag."""
        text = str(self)
        if self.setting and text.startswith(self.setting):
            flag = flag_prefix + self.setting.replace("_", "-")
            return flag + text[len(self.setting) :]
        return text


class ComoveNote(UserWarning):
    """Something a user should know before a run's results: a warning, in one line.

    The command line prints it as ``comove COMMAND: note: ...`` on standard
    error; library users see it as a warning and can filter it by this class.
    """


class RenamedSetting(ComoveNote, FutureWarning):
    """A setting given by its former name: read as the new one, for one release more."""


class EngineError(Exception):
    """A run that its engine could not carry out, explained in one line.

    Not a problem with the input: the cluster that runs the tasks cannot (its
    workers lack comove, or keep dying). The command line prints the message
    without a traceback and exits with status 1; nothing was written.
    """


def bad_setting(setting: str, problem: str) -> InputError:
    """Return the error for a setting whose value is not allowed.

    Examples
    --------
    >>> err = bad_setting("min_size", "must be a whole number of at least 2")
    >>> str(err)
    'min_size must be a whole number of at least 2'
    >>> err.worded_for()
    '--min-size must be a whole number of at least 2'
    """
    return InputError(f"{setting} {problem}", setting=setting)
