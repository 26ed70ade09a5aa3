"""The error types a build can end with; the CLI maps each to its exit code."""


class BadInput(Exception):
    """Input that cannot be used (exit 2). The message says what, where, and how to fix it."""
