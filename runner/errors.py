"""Typed errors raised by dyadperm.

Library code raises these; only :mod:`dyadperm.cli` turns them into exit codes and
one-line messages. Every message names the file, row/column or setting at fault, the
rule, and the value found.
"""

from __future__ import annotations


class DyadpermError(Exception):
    """Base class of every error dyadperm raises on purpose."""


class InputError(DyadpermError, ValueError):
    """Bad input: a file, a value, an argument or a study setting breaks a rule (exit 2)."""


class RunFileError(DyadpermError):
    """A run file is missing, truncated, corrupted, locked or belongs to another study (exit 2)."""


class NumericalError(DyadpermError):
    """The computation cannot give a trustworthy answer (separation, extreme collinearity)."""


class DyadpermWarning(UserWarning):
    """Something the user should know that does not stop the run (near-collinearity, notes)."""
