"""Exception types shared by the library and the command line.

Every error a user can cause by bad input derives from :class:`BOSError`;
the CLI turns it into a one-line message and exit code 2.  Messages must
be one line, name the problem and, where possible, the offending value.
"""

from __future__ import annotations


class BOSError(Exception):
    """Base class for user-facing errors (bad input, impossible geometry...)."""


class InputError(BOSError, ValueError):
    """A value, array or configuration entry is invalid."""


class GeometryError(InputError):
    """The described rig is physically impossible or out of range."""


class ConfigError(InputError):
    """The experiment file is malformed, has unknown keys or missing values."""


class DataFileError(BOSError, OSError):
    """A file is missing, unreadable, corrupt or cannot be written."""


class NoTextureError(InputError):
    """An image has no usable background texture (blank, saturated, uniform)."""
