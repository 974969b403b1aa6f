"""The exception tree.

Every error tinyloc raises on bad input derives from :class:`TinylocError` and
also from the builtin it refines, so callers may catch either. The CLI turns any
of these into one line on stderr and a non-zero exit status.
Inside the per-frame loop failures are data (status flags), not exceptions.
"""

from __future__ import annotations


class TinylocError(Exception):
    """Base of all tinyloc errors."""


class InputError(TinylocError, ValueError):
    """A user-supplied value, option or file is wrong (the message says which and why)."""


class GeoJSONError(InputError):
    """A GeoJSON source is malformed or holds geometry we cannot rasterize."""


class RulesError(InputError):
    """A class-rules file is malformed."""


class MapFormatError(TinylocError, ValueError):
    """A packed map file is malformed, truncated, or of an unsupported version."""


class CalibrationError(InputError):
    """A camera calibration file or calibration input is malformed or unusable."""


class RunFolderError(InputError):
    """A run folder is missing files or holds inconsistent data."""


class LinkError(TinylocError, IOError):
    """A transport (serial port, UDP socket) failed or was given a bad address."""


class ProtocolError(TinylocError, ValueError):
    """A wire frame or message is malformed."""


def fault(path: object, message: str, cls: type[TinylocError] = InputError) -> TinylocError:
    """Build an error whose message names the file (or source) first.

    Parameters
    ----------
    path : object
        File path or other source name; rendered with ``str``.
    message : str
        What is wrong, in a few words.
    cls : type
        The error class to build.
    """
    return cls(f"{path}: {message}")
