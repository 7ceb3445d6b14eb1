"""Typed domain errors.

Every error a user can cause or meet carries an exit code for the CLI and an
HTTP status for the service, so each front end turns it into one clear line or
one JSON body in exactly one place.
"""

from __future__ import annotations


class NearsightError(Exception):
    """Base class: a failure that should be reported as one line, not a traceback."""

    exit_code = 1
    http_status = 500
    code = "error"

    def __init__(self, message: str):
        super().__init__(message)
        self.message = message

    def to_dict(self) -> dict:
        return {"error": self.code, "message": self.message}


class UsageError(NearsightError):
    """Bad arguments or settings given by the user."""

    exit_code = 2
    http_status = 400
    code = "bad_request"


class NotFoundError(NearsightError):
    """A store, image, group or file that does not exist."""

    http_status = 404
    code = "not_found"


class StoreError(NearsightError):
    """The store cannot be opened or is in a state we cannot work with."""

    code = "store_error"


class ComeBackLater(NearsightError):
    """A refusal that says when to try again: the service sends `retry_after` as Retry-After."""

    def __init__(self, message: str, retry_after: int):
        super().__init__(message)
        self.retry_after = retry_after


class TooManyRequestsError(ComeBackLater):
    """A client sent more uploads or writes in a minute than allowed (service/guard.py)."""

    http_status = 429
    code = "too_many_requests"


class BusyError(ComeBackLater):
    """The service decodes as many uploads as it may at once (service/guard.py)."""

    http_status = 503
    code = "busy"


class DiskFullError(StoreError):
    """The disk (or the user's quota) ran out of space while writing. Nothing published is lost: the run
    stops before its new generation is published, and a rerun after space is freed picks up its work."""

    exit_code = 74  # EX_IOERR of BSD's sysexits.h
    http_status = 507
    code = "disk_full"


def disk_full(exc: BaseException) -> "DiskFullError | None":
    """The DiskFullError an OS or SQLite error stands for, or None: ENOSPC or EDQUOT from the system,
    SQLITE_FULL ("database or disk is full") from the catalog."""
    import errno
    import sqlite3

    where = ""
    if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT):
        where = f" while writing {exc.filename}" if exc.filename else ""
    elif not (isinstance(exc, sqlite3.OperationalError) and "full" in str(exc).lower()):
        return None
    return DiskFullError(f"the disk is full{where}: free some space and run the command again (the store "
                         "keeps serving what it last published; the rerun picks up this run's work)")


class StoreLockedError(StoreError):
    """Another run holds the store's lock."""

    exit_code = 3
    http_status = 409
    code = "store_locked"


class NotReadyError(NearsightError):
    """A stage needs an artifact that has not been built yet (a model, an index)."""

    exit_code = 1
    http_status = 409
    code = "not_ready"


class ImageReadError(NearsightError):
    """A file that could not be decoded as an image.

    `reason` is a short stable code (``truncated``, ``not-image``, ...) stored in
    the catalog; `detail` is the human explanation.
    """

    http_status = 422
    code = "unreadable_image"

    def __init__(self, reason: str, detail: str):
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail

    def to_dict(self) -> dict:
        return {"error": self.code, "reason": self.reason, "message": self.detail}


class AuthError(NearsightError):
    """A request without the API key, or with a wrong one (RFC 6750: 401 with WWW-Authenticate)."""

    http_status = 401
    code = "unauthorized"


class ForbiddenError(NearsightError):
    """A request this server is configured never to allow (e.g. writing with no API key set)."""

    http_status = 403
    code = "forbidden"


class MisdirectedError(NearsightError):
    """A request naming a host this server does not answer for (RFC 9110 §15.5.20: 421). It keeps a web page
    that rebinds its own name to 127.0.0.1 (DNS rebinding) from reading the collection through a browser."""

    http_status = 421
    code = "misdirected_request"


class PayloadTooLargeError(NearsightError):
    """A request body over the service's upload limit."""

    http_status = 413
    code = "payload_too_large"


class UnsupportedMediaError(NearsightError):
    """A request body of a media type the endpoint does not take (e.g. text where an image belongs)."""

    http_status = 415
    code = "unsupported_media_type"
