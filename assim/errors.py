"""User-facing errors.

Every problem a user can fix (a bad file, a bad config value, a restart that does not fit the
run) is raised as an :class:`AssimError` subclass carrying the file, the variable and the
place. The CLI prints ``str(error)`` as one line on stderr and exits with status 2; any other
exception is a bug and keeps its traceback.
"""

from __future__ import annotations


class AssimError(Exception):
    """Base class of the user-facing errors.

    Parameters
    ----------
    message : str
        What is wrong and what is expected, in words a user can act on.
    file : str or os.PathLike, optional
        The file (or config) where the problem is.
    variable : str, optional
        The variable, column or config key concerned.
    place : str, optional
        The first bad place: a row, a basin, a date, an index.
    """

    def __init__(self, message: str, *, file=None, variable=None, place=None):
        self.message = str(message)
        self.file = None if file is None else str(file)
        self.variable = None if variable is None else str(variable)
        self.place = None if place is None else str(place)
        super().__init__(self.format())

    def format(self) -> str:
        """One line: ``file: variable 'v' at place: message``."""
        head = []
        if self.file:
            head.append(self.file)
        where = []
        if self.variable:
            where.append(f"variable '{self.variable}'")
        if self.place:
            where.append(f"at {self.place}")
        text = ": ".join(h for h in (" ".join(head), " ".join(where)) if h)
        line = f"{text}: {self.message}" if text else self.message
        return " ".join(line.split())  # always one line


class ConfigError(AssimError):
    """The configuration file or an override is invalid."""


class InputError(AssimError):
    """A raw or prepared input file is missing, unreadable or invalid."""


class RestartError(AssimError):
    """A restart file does not match the run it is asked to continue."""


class RunError(AssimError):
    """A run cannot go on (NaN in states, a lock held by another run, an unwritable folder)."""


class LockError(RunError):
    """Another run holds the lock on the same outputs."""


class AssimWarning(RuntimeWarning):
    """A notice for the operator: the run goes on, but something needs a look (a stale lock
    replaced, a restart written with other settings). The CLI always prints these, as one
    line, whatever the warning filters."""
