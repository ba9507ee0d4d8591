"""The product's name as users type it, in one place (help texts, errors, hints)."""

__all__ = ["FORMER_PROGRAM", "PROGRAM"]

PROGRAM = "tiltyard"  # the command; the Python package keeps the folder name `harness`
FORMER_PROGRAM = "harness"  # the old command name, kept as an alias for one release
