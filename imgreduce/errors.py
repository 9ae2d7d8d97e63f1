"""One small exception hierarchy.

Library code raises these; the command line prints their message on one line and exits
with status 1. Every message names the file or parameter, what was found, what was
expected and how to fix it.
"""

__all__ = [
    "ImgreduceError",
    "InputError",
    "ParameterError",
    "BasisFileError",
    "ModelMismatchError",
]


class ImgreduceError(Exception):
    """Base class of every error this package raises on purpose."""


class InputError(ImgreduceError):
    """Image files or folders that cannot be used as given (missing, empty, mixed)."""


class ParameterError(ImgreduceError, ValueError):
    """An option or argument with a value outside what it accepts."""


class BasisFileError(ImgreduceError):
    """A basis or archive file that is missing, truncated, foreign or of an unknown version."""


class ModelMismatchError(ImgreduceError):
    """Images that do not match a basis (shape, channels, bit depth or colour policy)."""
