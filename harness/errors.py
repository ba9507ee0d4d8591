"""The one error type the harness raises for problems a user can fix."""


class HarnessError(Exception):
    """A problem with the user's input or environment, with a one-line actionable message."""
