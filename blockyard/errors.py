"""The one exception type for mistakes a user can fix (bad config, path, corpus, argument).

The CLI catches it once, prints ``error: <message>`` on one line and exits with its ``exit_code``
(2 for bad input, 4 when a file cannot be written).
Everything else is a bug and keeps its traceback.
"""

from __future__ import annotations


class UserError(Exception):
    """A problem in the user's input; the message names the key or path and what is allowed."""

    exit_code = 2


class ConfigError(UserError):
    """A config value that the schema rejects; the message starts with the dotted key path."""

    def __init__(self, path: str, message: str) -> None:
        self.path = path
        super().__init__(f"{path}: {message}" if path else message)


class WriteFailed(UserError):
    """A file could not be written: disk full, quota, read-only filesystem, permission, I/O error.

    Nothing earlier is lost (writes are atomic or cut back), so rerunning the same command after
    the cause is fixed resumes. Exit code 4, to tell it apart from bad input (2).
    """

    exit_code = 4

    def __init__(self, message: str, *, path: object = None, errno: int | None = None) -> None:
        self.path, self.errno = path, errno
        super().__init__(message)

    def with_hint(self, hint: str) -> WriteFailed:
        """The same failure with what to do next appended (e.g. which checkpoint stays the resume point)."""
        return WriteFailed(f"{self}; {hint}", path=self.path, errno=self.errno)
