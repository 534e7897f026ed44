"""Exception types raised by encodex.

Every error a user can cause carries a one-line message that names the problem and the fix.
The command line turns any :class:`EncodexError` into that line on standard error and exit
code 2; Python callers catch the specific type.
"""

from __future__ import annotations


class EncodexError(Exception):
    """Base class of every error encodex raises on purpose."""


class InputError(EncodexError, ValueError):
    """Input data are malformed, inconsistent or in the wrong unit."""


class FileFormatError(InputError):
    """A file is truncated, not of the expected format, or lacks an expected object."""


class SettingsError(EncodexError, ValueError):
    """An option or setting is out of range or inconsistent with the data."""


class CheckpointMismatchError(EncodexError):
    """An output folder holds results computed with different settings."""


class OutputError(EncodexError, OSError):
    """An output folder or file cannot be written."""
