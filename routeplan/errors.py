"""Named exceptions that reach the user.

Every message says what went wrong and, where it helps, what to do next. The CLI turns
:class:`InputError` (and its subclasses) into exit code 2 with one line on stderr; anything
else escaping the library is an internal fault (exit code 1).
"""

from __future__ import annotations


class RouteplanError(Exception):
    """Base class of routeplan's own errors."""


class InputError(RouteplanError):
    """Bad input from the user: a file, an option or a name.

    Parameters
    ----------
    message : str
        What is wrong and, where it helps, what to do.
    source : str, optional
        The file (or option) the problem is in.
    line : int, optional
        1-based line of a text file (the header is line 1), or 1-based row of a Parquet file.
    unit : str, default="line"
        How the position is named: ``line`` (CSV) or ``row`` (Parquet).
    """

    def __init__(self, message: str, *, source: str | None = None, line: int | None = None, unit: str = "line"):
        self.message = message
        self.source = source
        self.line = line
        self.unit = unit
        super().__init__(self.one_line())

    def one_line(self) -> str:
        """The message as one line: ``FILE line N: problem``."""
        where = ""
        if self.source is not None:
            where = self.source
            if self.line is not None:
                where += f" {self.unit} {self.line}"
            where += ": "
        return (where + self.message).replace("\n", " ").replace("\r", " ")


class WorkspaceMissing(InputError):
    """No routeplan workspace in the folder."""


class WorkspaceExists(InputError):
    """A workspace is already there; init refuses to overwrite it."""


class OutputError(InputError):
    """A file or folder could not be written: no permission, a read-only file system, a full disk.

    The user can fix it (another path, free space, permissions), so it is reported as bad input
    (exit code 2), naming the path and the system's reason.
    """

    @classmethod
    def from_os_error(cls, exc: Exception, path: object, *, what: str = "write the file",
                      hint: str = "check that the folder is writable and has free space, or choose another "
                                  "path") -> "OutputError":
        """The error for ``exc``, raised while writing ``path``.

        Parameters
        ----------
        exc : OSError or sqlite3.Error
            What the operating system (or SQLite) reported; its ``strerror`` (e.g. "No space
            left on device"), or else its message, is the reason given.
        path : str or path-like
            The file or folder the user named (not a temporary file beside it).
        what : str, default="write the file"
            What could not be done, for the message.
        hint : str
            What the user can do about it, for the message.

        Returns
        -------
        OutputError
        """
        reason = getattr(exc, "strerror", None) or str(exc) or type(exc).__name__
        notes = "; ".join(getattr(exc, "__notes__", ()))
        return cls(f"cannot {what} ({reason}){'; ' + notes if notes else ''}; {hint}", source=str(path))


class NotFitted(InputError):
    """A command needs a fitted model and there is none yet."""


class ExpertsWithoutAnswers(UserWarning):
    """Some experts have no known answer in a router's training split.

    Parameters
    ----------
    message : str
    experts : list of int
        Their answer columns, so that a caller that knows the names can say them.
    """

    def __init__(self, message: str, experts: list[int]) -> None:
        super().__init__(message)
        self.experts = list(experts)
