"""The one exception type for mistakes a user can fix (bad config, path, corpus, argument).

The CLI catches it once, prints ``error: <message>`` on one line and exits with code 2.
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
