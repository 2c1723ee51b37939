"""One exception family for errors a user can cause.

The command line turns any :class:`RoomcorrError` into a one-line message on
standard error and exit status 2. Programming errors stay ordinary exceptions.
"""

from __future__ import annotations


class RoomcorrError(Exception):
    """Base class for every error a user can cause and fix."""


class InputFileError(RoomcorrError):
    """An input file is missing, unreadable or unsuitable (the message names it)."""


class BadNameError(InputFileError):
    """A run id or file name given from outside is malformed (NUL byte, far too long, a
    separator): the request is wrong, not a missing file (the app answers 400)."""


class SettingsError(RoomcorrError):
    """An option or settings-file value is invalid (the message names the key)."""


class SafetyError(RoomcorrError):
    """A requested design or level would break a safety limit."""


class OutputError(RoomcorrError):
    """An output folder or file cannot be written as asked."""


class RoomBusyError(OutputError):
    """Another roomcorr command holds the room folder's lock (try again when it ends)."""


class DeviceError(RoomcorrError):
    """The audio device or audio library is missing or misbehaves."""
