"""Errors that the command line reports to a person as one clear line (no traceback).

Every error raised for bad input derives from :class:`SelfplayError`; the message names what
was wrong (the field, file or value) and why.
"""

from __future__ import annotations


class SelfplayError(Exception):
    """Base class of every user-facing error of the project."""


class ConfigError(SelfplayError, ValueError):
    """A configuration field, CLI argument or option has a bad value."""


class UnknownGameError(ConfigError):
    """A game name that is not registered."""


class IllegalMoveError(SelfplayError, ValueError):
    """A move that the rules do not allow in the given position."""


class FormatError(SelfplayError, ValueError):
    """A file (SGF, shard, snapshot, metrics) is malformed or of an unsupported version."""


class SnapshotError(SelfplayError):
    """A snapshot cannot be loaded: foreign game, mismatched shapes, pickle, corrupt file."""


class RunDirError(SelfplayError):
    """A path is not a run directory, or belongs to another game or configuration."""
