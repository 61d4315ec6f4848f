"""Exceptions and warnings shared by every stage.

An :class:`InputError` is a user mistake (bad file, column, value); the CLI turns it into one
message and exit code 2, never a traceback.
"""

from __future__ import annotations


class InputError(ValueError):
    """A problem with the user's inputs that stops the run.

    The message follows the project's shape: what is wrong, where (file, layer or column, basin,
    row), the rule, the value found and how to fix it.
    """


class InputWarning(UserWarning):
    """A problem with the inputs that lets the run go on; it lands in the report."""


class RunError(RuntimeError):
    """The system failed the run, not the inputs: disk full, permission denied, a cluster that
    does not answer. The CLI turns it into one message and exit code 3; earlier results are
    left intact."""
