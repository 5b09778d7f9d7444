"""Errors and exit codes shared by every stage.

Exit codes of the command line (documented in the README):

    0  success
    1  unexpected internal error (a bug: please report it)
    2  bad input: a file, column, row, group or option that cannot be used
    3  results written, but the diagnostics targets were missed
    4  nothing new to do (the store has no batch since the last refit)
    5  stopped by the user (Ctrl-C or SIGTERM); nothing half-written is left
    6  output cannot be written (folder exists, not writable, disk full)
"""

from __future__ import annotations

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2
EXIT_TARGETS_MISSED = 3
EXIT_NOTHING_NEW = 4
EXIT_INTERRUPTED = 5
EXIT_OUTPUT = 6


class PoolingError(Exception):
    """Base class: carries the exit code the command line should use."""

    exit_code = EXIT_INTERNAL


class InputError(PoolingError, ValueError):
    """Bad input: the message names the file, column, row or group, what was expected and found."""

    exit_code = EXIT_BAD_INPUT


class ModelError(InputError):
    """An improper or unidentifiable model set-up; the message says what to do instead."""


class OutputError(PoolingError, OSError):
    """The run folder or store cannot be written."""

    exit_code = EXIT_OUTPUT


class Interrupted(PoolingError):
    """The user stopped a run; nothing half-written was left behind."""

    exit_code = EXIT_INTERRUPTED


class NothingNew(PoolingError):
    """A refit found no batch added or withdrawn since the last run."""

    exit_code = EXIT_NOTHING_NEW


class PoolingWarning(UserWarning):
    """Results are usable but something deserves attention (for example missed diagnostics targets)."""
