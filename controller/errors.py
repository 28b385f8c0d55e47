"""The controller's own errors, below ``RatefitError`` (see ``ratefit.models.errors``).

    RatefitError
    └── KubeError                 the Kubernetes API did not do what was asked
        ├── KubeConflict          409: the object changed since it was read (re-read, recompute, retry)
        ├── KubeUnavailable       429 / 5xx / connection failure (temporary; retry later)
        ├── KubeInvalid           422 (or 400): the server refused the object; carries its message
        ├── KubeNotFound          404: the object (or the API group) does not exist
        ├── KubeForbidden         401 / 403: the service account lacks a permission (fix RBAC)
        └── KubeGone              410: a watch or list position expired (re-list)
    └── SizingApiError            the sizing API did not give a usable answer (controller/sizing_client.py)
        ├── SizingApiUnavailable  connection failure / timeout / 5xx after the retries (temporary)
        └── SizingApiRejected     4xx: the request was refused (token, input, size); carries the message

These are raised only by the Kubernetes adapter (``controller/kube*.py``), which
translates the client's ``ApiException`` and urllib3 errors exactly once and chains
the original with ``raise … from``. Nothing outside the adapter sees a
``kubernetes`` exception. ``temporary`` says whether waiting and retrying can help.
"""

from __future__ import annotations

from ratefit.models.errors import RatefitError


class KubeError(RatefitError):
    """A Kubernetes API call failed. ``status`` is the HTTP code (None: no answer),
    ``reason`` the Status reason (e.g. ``Conflict``), ``what`` the call that failed."""

    temporary: bool = False

    def __init__(
        self,
        message: str,
        *,
        status: int | None = None,
        reason: str | None = None,
        what: str = "",
        retry_after: float | None = None,
    ) -> None:
        self.status = status
        self.reason = reason
        self.what = what
        self.server_message = message
        #: seconds the server asked us to wait (Retry-After), if it said so
        self.retry_after = retry_after
        prefix = f"{what}: " if what else ""
        code = f" (HTTP {status}{' ' + reason if reason else ''})" if status else ""
        super().__init__(f"{prefix}{message}{code}{self.hint()}")

    def hint(self) -> str:
        return ""


class KubeConflict(KubeError):
    """409: someone changed the object after we read it (stale resourceVersion), or it
    already exists. Re-read the object, recompute the change and try again."""

    def hint(self) -> str:
        return " — re-read the object and retry"


class KubeUnavailable(KubeError):
    """The API server is overloaded (429), failing (5xx) or unreachable. Temporary."""

    temporary = True

    def hint(self) -> str:
        return " — the API server is busy or unreachable; retried with backoff"


class KubeInvalid(KubeError):
    """422/400: the server refused the object. ``server_message`` is its own wording
    (e.g. ``…requests: Invalid value: "2": must be less than or equal to cpu limit of 1``)."""

    def hint(self) -> str:
        return " — the change was refused by validation; nothing was stored"


class KubeNotFound(KubeError):
    """404: the object or its API (e.g. the SizingPolicy CRD) does not exist."""

    def hint(self) -> str:
        return " — check the name and namespace, or install the CRD (manifests/crd)"


class KubeForbidden(KubeError):
    """401/403: the controller's identity may not do this."""

    def hint(self) -> str:
        return " — grant the permission in the controller's RBAC (manifests/rbac)"


class KubeGone(KubeError):
    """410: the resourceVersion we asked for is too old. List again and restart from
    the list's resourceVersion."""


class SizingApiError(RatefitError):
    """The sizing API (``ratefit serve``) did not give a usable answer. Raised only by
    ``controller/sizing_client.py``, which translates httpx errors once."""

    temporary: bool = False

    def __init__(self, message: str, *, status: int | None = None, url: str = "") -> None:
        self.status = status
        self.url = url
        super().__init__(message)


class SizingApiUnavailable(SizingApiError):
    """The sizing API could not be reached, timed out or answered 5xx, on every try.
    Temporary: the reconcile loop holds its decisions and tries again next pass."""

    temporary = True


class SizingApiRejected(SizingApiError):
    """The sizing API refused the request with a 4xx (401: wrong or missing token — check
    the token file both sides use; 422/413: the request itself is wrong). Retrying the
    same request cannot help."""
