"""The archive's refusals, each with a message a lab user can act on and an HTTP status."""

from __future__ import annotations


class ArchiveError(Exception):
    """A refused archive operation, with a message a lab user can act on."""

    def __init__(self, message: str, status: int = 409) -> None:
        super().__init__(message)
        self.status = status


class NotFound(ArchiveError):
    def __init__(self, message: str) -> None:
        super().__init__(message, status=404)


class IntegrityError(ArchiveError):
    """Stored data that fails its check against the signed entry when read (HTTP 409)."""

    def __init__(self, message: str) -> None:
        super().__init__(
            message + "; nothing is shown from it — an auditor should run verify", status=409
        )
