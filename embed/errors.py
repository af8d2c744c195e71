"""Typed errors for bad user input.

Every error a user can fix subclasses :class:`TwinpatchError` (itself a ``ValueError``).
The command line prints its message as one line and exits with code 2, without a traceback.
Messages say what is wrong, where (file or key), what was found, and the fix.
"""


class TwinpatchError(ValueError):
    """Base class of every user-input error."""


class ConfigError(TwinpatchError):
    """A configuration file, key, value or ``--set`` override is invalid."""


class CohortError(TwinpatchError):
    """A manifest, NIfTI image, mask or grid is invalid."""


class BundleError(TwinpatchError):
    """An encoder bundle is missing, corrupt, or does not match its checksum."""


class InputError(TwinpatchError):
    """Any other bad input (command-line arguments, images handed to an encoder)."""
