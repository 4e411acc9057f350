"""Errors a user can act on.

Every error raised for bad input derives from :class:`UserError`; the command line prints its
message on one line and exits non-zero, without a traceback. Messages name the file, row,
column or key at fault and say what would be valid.
"""

from __future__ import annotations


class UserError(Exception):
    """Something in the user's input (files, job file, parameters) is wrong."""

    exit_code = 2


class ConfigError(UserError):
    """The job file or command-line options are invalid (names the key)."""


class InputError(UserError):
    """A catalogue file is missing, unreadable or has the wrong shape (names the file)."""


class PlanError(UserError):
    """The annotators cannot be arranged for this catalogue (names the column or annotator)."""


class OutputError(UserError):
    """The output folder cannot be used as asked (names the folder)."""


class PluginError(UserError):
    """A plugin is broken: a misspelt hook, a duplicate name, a bad declaration."""


class PathRefusedError(ConfigError):
    """A job names a file outside the folders it may read (the service answers 403)."""
