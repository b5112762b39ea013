"""Errors that reach the user as one line and exit code 2.

An :class:`InputError` is a problem with something the user gave us (a file, a
column, an option). The command-line layer prints its message and exits with
code 2; it never shows a traceback. Anything else is a bug and propagates.
"""


class InputError(Exception):
    """A problem with the user's input: the message names the file, row or column and the fix."""


class PlanError(InputError):
    """A plan that cannot be met: the message names the rule that cannot be satisfied."""
