"""The single error type for problems the user can fix (bad input, bad options)."""

from __future__ import annotations


class InputError(ValueError):
    """A user-facing problem: says what is wrong, where, and how to fix it.

    The command line turns it into a one-line message and exit code 2.
    """
