"""User errors the HTTP layer adds to closure.errors, and their status codes."""

from __future__ import annotations

from closure.errors import InputFileError, InputTooLargeError, OptionError, UserError
from closure.store import NotFoundError


class ForbiddenPathError(UserError):
    """A path outside the server's data roots."""


class AuthError(UserError):
    """A missing or wrong bearer token."""


class ConflictError(UserError):
    """The request does not fit the resource's state (e.g. canceling a finished job)."""


class TooLargeError(UserError):
    """An upload over the size limit."""


class UnsupportedMediaError(UserError):
    """An upload in an encoding we do not take."""


def status_for(exc: UserError) -> int:
    """The HTTP status of a user error: the most specific class wins."""
    for cls, code in ((AuthError, 401), (ForbiddenPathError, 403), (NotFoundError, 404),
                      (ConflictError, 409), (TooLargeError, 413),
                      (InputTooLargeError, 413), (UnsupportedMediaError, 415),
                      (InputFileError, 422), (OptionError, 422)):
        if isinstance(exc, cls):
            return code
    return 400
