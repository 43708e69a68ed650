"""The service's exceptions. Only the API edge turns them into HTTP and OperationOutcome.

    ServiceError
    ├── RequestRejected          one or more issues with what the client sent (400/404/408/409/410/412/413/415/422)
    └── NotFound                 the resource or version is not held (404)
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["Issue", "NotFound", "RequestRejected", "ServiceError"]


@dataclass(frozen=True, slots=True)
class Issue:
    """One OperationOutcome issue: FHIR issue-type ``code``, a message, and FHIRPath locations."""

    code: str
    message: str
    expression: tuple[str, ...] = ()
    severity: str = "error"
    status: int = 400  # the HTTP status this issue deserves on its own

    def at(self, prefix: str) -> Issue:
        """The same issue with its locations moved under ``prefix`` (e.g. a Bundle entry)."""
        exprs = tuple(f"{prefix}.{e.split('.', 1)[1]}" if "." in e else prefix for e in self.expression)
        return Issue(self.code, self.message, exprs or (prefix,), self.severity, self.status)


class ServiceError(Exception):
    """Base of everything the service raises on purpose."""


@dataclass
class RequestRejected(ServiceError):
    issues: list[Issue] = field(default_factory=list)

    def __post_init__(self) -> None:
        super().__init__("; ".join(i.message for i in self.issues))

    @property
    def status(self) -> int:
        """The most telling status among the errors (413 and 422 over a plain 400)."""
        errors = [i.status for i in self.issues if i.severity in ("error", "fatal")]
        for preferred in (403, 408, 413, 415, 409, 412, 404, 410, 422):
            if preferred in errors:
                return preferred
        return 400


class NotFound(ServiceError):
    pass
