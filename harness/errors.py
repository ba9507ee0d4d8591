"""The error types the harness raises for problems a user can fix.

Every one is a `HarnessError`: the command line prints its message on one line and exits 2.
Errors about one config key carry the key and the problem as fields, so a caller can place
them (file and line) or reword them without parsing the message back.
"""

from __future__ import annotations

__all__ = ["HarnessError", "SettingError", "UnknownKeyError"]


class HarnessError(Exception):
    """A problem with the user's input or environment, with a one-line actionable message."""


class SettingError(HarnessError):
    """A config value that cannot work: `key` (dotted), `problem` (what is wrong and what would do).

    `where` is how the key is shown ("'train.epochs' in x.yaml line 4"); without it the bare key.
    """

    def __init__(self, key: str, problem: str, *, where: str | None = None) -> None:
        self.key, self.problem, self.where = key, problem, where
        super().__init__(f"{where or key}: {problem}")

    def located(self, where: str) -> SettingError:
        """The same problem, shown at `where` (the key's file and line)."""
        return SettingError(self.key, self.problem, where=where)


class UnknownKeyError(HarnessError):
    """A config key that does not exist: `key`, where it was written, and a `hint` (a near miss or the known keys)."""

    def __init__(self, key: str, where: str, hint: str) -> None:
        self.key, self.where_text, self.hint = key, where, hint
        super().__init__(f"unknown key {where}; {hint}")
