"""Every error the runtime raises on purpose.

One root, ``DemurError``; each subclass is also the built-in it most resembles,
so callers that only know Python's own exceptions still catch it::

    DemurError
    ├── ConfigError(ValueError)              a setting is missing or malformed
    ├── BundleError(ValueError)              a bundle cannot be trusted
    │   ├── BundleNotFound(FileNotFoundError)
    │   ├── ManifestInvalid                  JSON or schema problem in manifest.json
    │   ├── UnsupportedFormat                format name or version we cannot read
    │   ├── ChecksumMismatch                 a file's SHA-256 is not the recorded one
    │   └── SmokeFailed                      loads, but its smoke prediction fails (roll-outs)
    ├── InvalidInput(ValueError)             a request is wrong (HTTP 400)
    │   ├── PayloadTooLarge                  body or case count over the limit (413)
    │   ├── UnsupportedMediaType             not application/json (415)
    │   └── OutputNotFinite                  valid cases whose draws overflow to NaN/inf (422)
    ├── Unauthorized(PermissionError)        no or unknown token (401)
    ├── Forbidden(PermissionError)           token lacks the scope (403)
    ├── NotFound(LookupError)                no such item or route (404)
    ├── Conflict(RuntimeError)               state forbids the change (409)
    ├── NotLoaded(RuntimeError)              engine used before a bundle is loaded (503)
    ├── Overloaded(RuntimeError)             queue full or deadline passed (503)
    ├── GraphRunError(RuntimeError)          onnxruntime failed on validated input (500)
    ├── ReviewStoreUnavailable(ConnectionError)  the review store cannot be reached
    ├── ReviewItemRejected(ValueError)       this one item can never be stored (set aside)
    ├── CalibrationInfeasible(ValueError)    no threshold meets the target

Every error carries ``field`` (the offending key path, or ``None``), an HTTP
``status`` and a short machine ``code``; ``to_payload`` gives the JSON body
``{"error": {"code", "message", "field"}}`` that the app returns.
"""

from __future__ import annotations

from typing import Any

__all__ = [
    "BundleError",
    "BundleNotFound",
    "CalibrationInfeasible",
    "ChecksumMismatch",
    "ConfigError",
    "Conflict",
    "DemurError",
    "Forbidden",
    "GraphRunError",
    "InvalidInput",
    "ManifestInvalid",
    "NotFound",
    "NotLoaded",
    "OutputNotFinite",
    "Overloaded",
    "PayloadTooLarge",
    "Refused",
    "ReviewItemRejected",
    "ReviewStoreUnavailable",
    "SmokeFailed",
    "Unauthorized",
    "UnsupportedFormat",
    "UnsupportedMediaType",
    "internal_error",
]


class DemurError(Exception):
    """Root of demur's errors: a message, the offending field, an HTTP status."""

    status: int = 500
    code: str = "internal"

    def __init__(self, message: str, *, field: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.field = field

    def to_payload(self) -> dict[str, Any]:
        return {"error": {"code": self.code, "message": self.message, "field": self.field}}


class ConfigError(DemurError, ValueError):
    status = 500
    code = "bad_config"


class BundleError(DemurError, ValueError):
    status = 422
    code = "bad_bundle"


class BundleNotFound(BundleError, FileNotFoundError):
    code = "bundle_not_found"


class ManifestInvalid(BundleError):
    code = "manifest_invalid"


class UnsupportedFormat(BundleError):
    code = "unsupported_format"


class ChecksumMismatch(BundleError):
    code = "checksum_mismatch"


class SmokeFailed(BundleError):
    """A candidate bundle passed its checksums but failed its smoke prediction."""

    code = "smoke_failed"


class InvalidInput(DemurError, ValueError):
    status = 400
    code = "invalid_input"


class OutputNotFinite(InvalidInput):
    """Valid inputs the model's float32 arithmetic cannot carry: some draw of these cases is NaN or
    infinite (an input far beyond the training data overflows a layer). Refused, never served: a
    NaN probability would decide nothing. ``cases``: the offending positions in the graph's batch."""

    status = 422
    code = "output_not_finite"

    def __init__(self, message: str, *, field: str | None = None, cases: list[int] | None = None) -> None:
        super().__init__(message, field=field)
        self.cases = list(cases or [])


class PayloadTooLarge(InvalidInput):
    status = 413
    code = "payload_too_large"


class UnsupportedMediaType(InvalidInput):
    status = 415
    code = "unsupported_media_type"


class Unauthorized(DemurError, PermissionError):
    status = 401
    code = "unauthorized"


class Forbidden(DemurError, PermissionError):
    status = 403
    code = "forbidden"


class NotFound(DemurError, LookupError):
    status = 404
    code = "not_found"


class Conflict(DemurError, RuntimeError):
    status = 409
    code = "conflict"


class NotLoaded(DemurError, RuntimeError):
    status = 503
    code = "not_loaded"


class Overloaded(DemurError, RuntimeError):
    status = 503
    code = "overloaded"

    def __init__(self, message: str, *, retry_after_s: float = 1.0, field: str | None = None) -> None:
        super().__init__(message, field=field)
        self.retry_after_s = retry_after_s


class GraphRunError(DemurError, RuntimeError):
    status = 500
    code = "graph_run_failed"


class ReviewStoreUnavailable(DemurError, ConnectionError):
    status = 503
    code = "review_store_unavailable"


class ReviewItemRejected(DemurError, ValueError):
    """A data error, not an outage: the store can never hold this item as it is (text the
    database cannot encode, a value out of its range). The store sets the item aside in its
    dead-letter table; retrying it would fail the same way, so it must not hold up others."""

    status = 422
    code = "review_item_rejected"


class CalibrationInfeasible(DemurError, ValueError):
    status = 422
    code = "calibration_infeasible"


class Refused(DemurError):
    """An HTTP refusal that is none of the named errors: its ``status`` and ``code`` are given
    (a routing 404 or 405, a framing 414 or 431, a 500). Every error body of every front is
    built from a ``DemurError`` by ``demur.serve.web.predict_http.refusal``, this one included."""

    def __init__(self, status: int, code: str, message: str, field: str | None = None) -> None:
        super().__init__(message, field=field)
        self.status = int(status)
        self.code = code


def internal_error() -> Refused:
    """The 500 every front answers for what it did not expect; the details go to the log only."""
    return Refused(500, "internal", "internal error; the server log has the details")
