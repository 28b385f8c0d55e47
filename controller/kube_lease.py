"""Leader election on a coordination.k8s.io/v1 Lease.

Only the Lease holder patches (DESIGN.md, "Faults"). The algorithm follows client-go's
leaderelection package (from memory):

* the record is the Lease spec: holderIdentity, leaseDurationSeconds, acquireTime,
  renewTime, leaseTransitions;
* a candidate takes the Lease when it is absent, released (no holder), or *expired*:
  the record has not changed for leaseDurationSeconds **as seen by the candidate's own
  clock** (client-go's observedTime — so clock skew between nodes cannot cut a lease
  short; a candidate that has just started waits one full duration before taking over);
* every write carries the resourceVersion it read (optimistic concurrency): of two
  candidates racing, one gets 409 and stays a follower;
* the holder renews every ``retry_period`` and counts itself leader only while its last
  successful renewal is younger than ``renew_deadline`` (< lease duration, so it stops
  acting before anyone else may take over);
* ``release()`` clears holderIdentity so a successor need not wait for expiry.

Defaults 15 s / 10 s / 2 s are client-go's (LeaseDuration, RenewDeadline, RetryPeriod;
from memory). The clock is injected (seconds since the epoch) so tests can step it.
"""

from __future__ import annotations

import json
import logging
import random
import time
from collections.abc import Callable
from datetime import datetime, timezone
from typing import Any

from kubernetes import client as k8s

from ratefit.controller.errors import KubeConflict, KubeError, KubeNotFound, KubeUnavailable
from ratefit.controller.kube_retry import RetryPolicy, call_with_retry

__all__ = ["LeaderElector", "micro_time", "parse_micro_time"]

log = logging.getLogger(__name__)


def micro_time(ts: float) -> str:
    """RFC 3339 with microseconds and Z, the MicroTime wire format (metav1.MicroTime)."""
    return datetime.fromtimestamp(ts, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def parse_micro_time(text: str | None) -> float | None:
    if not text:
        return None
    try:
        return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()
    except ValueError:
        return None


class LeaderElector:
    """One candidate for one Lease. Call ``try_acquire_or_renew()`` every
    ``retry_period`` seconds; act only while ``is_leader``; ``release()`` on shutdown."""

    def __init__(
        self,
        api_client: k8s.ApiClient,
        *,
        namespace: str,
        name: str,
        identity: str,
        lease_duration: float = 15.0,
        renew_deadline: float = 10.0,
        retry_period: float = 2.0,
        clock: Callable[[], float] = time.time,
        retry: RetryPolicy = RetryPolicy(max_attempts=2),
        sleep: Callable[[float], None] = time.sleep,
        rng: Callable[[], float] = random.random,
    ) -> None:
        if not (lease_duration > renew_deadline > retry_period > 0):
            raise ValueError("need lease_duration > renew_deadline > retry_period > 0 (client-go's rule)")
        self._api = k8s.CoordinationV1Api(api_client)
        self.namespace = namespace
        self.name = name
        self.identity = identity
        self.lease_duration = lease_duration
        self.renew_deadline = renew_deadline
        self.retry_period = retry_period
        self._clock = clock
        self._retry = retry
        self._sleep = sleep
        self._rng = rng
        self._observed_record: tuple[Any, ...] | None = None
        self._observed_at: float | None = None
        self._last_renew: float | None = None
        self._held = False

    # -- state -------------------------------------------------------------------
    @property
    def is_leader(self) -> bool:
        """True while we hold the Lease and renewed it within ``renew_deadline``."""
        if not self._held or self._last_renew is None:
            return False
        return self._clock() - self._last_renew < self.renew_deadline

    @property
    def holder(self) -> str | None:
        """The holder we last saw ("" or None: nobody)."""
        return self._observed_record[0] if self._observed_record else None

    # -- actions -----------------------------------------------------------------
    def try_acquire_or_renew(self) -> bool:
        """One round: create, renew or take over the Lease. True only when this call
        wrote the Lease with us as holder (so "renewed now"). API trouble (unavailable,
        lost race) returns False; ``is_leader`` then stays true until ``renew_deadline``
        after the last good renewal, and false after. Permission or validation errors
        are raised — they will not go away by themselves."""
        now = self._clock()
        try:
            lease = self._get()
        except KubeNotFound:
            return self._create(now)
        except KubeUnavailable as exc:
            log.warning("lease %s/%s: cannot read (%s)", self.namespace, self.name, exc)
            return False
        spec = lease.get("spec") or {}
        holder = spec.get("holderIdentity") or ""
        record = (
            holder,
            spec.get("leaseDurationSeconds"),
            spec.get("acquireTime"),
            spec.get("renewTime"),
            spec.get("leaseTransitions"),
        )
        if record != self._observed_record:
            self._observed_record = record
            self._observed_at = now
        duration = float(spec.get("leaseDurationSeconds") or self.lease_duration)
        if holder and holder != self.identity:
            assert self._observed_at is not None
            if self._observed_at + duration > now:
                self._held = False
                return False  # someone else holds a live lease
        new_spec = dict(spec)
        new_spec["holderIdentity"] = self.identity
        new_spec["leaseDurationSeconds"] = int(round(self.lease_duration))
        new_spec["renewTime"] = micro_time(now)
        if holder != self.identity:
            new_spec["acquireTime"] = micro_time(now)
            new_spec["leaseTransitions"] = int(spec.get("leaseTransitions") or 0) + (1 if holder else 0)
        body = self._body(lease["metadata"]["resourceVersion"], new_spec)
        return self._write(body, now, took_over=holder != self.identity)

    def _body(self, resource_version: str, spec: dict[str, Any]) -> dict[str, Any]:
        """The whole Lease for a replace, with the resourceVersion we read (optimistic
        concurrency: a stale one → 409, someone else wrote in between)."""
        return {
            "apiVersion": "coordination.k8s.io/v1",
            "kind": "Lease",
            "metadata": {"name": self.name, "namespace": self.namespace, "resourceVersion": resource_version},
            "spec": spec,
        }

    def release(self) -> None:
        """Give the Lease up (only if we hold it): clear holderIdentity, as client-go does
        on ReleaseOnCancel, so a successor takes over at once instead of after expiry."""
        was_held = self._held
        self._held = False
        self._last_renew = None
        if not was_held:
            return
        try:
            lease = self._get()
            spec = lease.get("spec") or {}
            if spec.get("holderIdentity") != self.identity:
                return
            now = self._clock()
            new_spec = dict(spec)
            new_spec.pop("holderIdentity", None)
            new_spec["leaseDurationSeconds"] = 1
            new_spec["renewTime"] = micro_time(now)
            body = self._body(lease["metadata"]["resourceVersion"], new_spec)
            self._call("release lease", lambda: self._api.replace_namespaced_lease(
                self.name, self.namespace, body, _preload_content=False))
        except (KubeConflict, KubeNotFound, KubeUnavailable) as exc:
            log.warning("lease %s/%s: release failed (%s); it expires by itself", self.namespace, self.name, exc)

    # -- internals ---------------------------------------------------------------
    def _call(self, what: str, fn: Callable[[], Any]) -> dict[str, Any]:
        resp = call_with_retry(fn, what=f"{what} {self.namespace}/{self.name}", policy=self._retry,
                               sleep=self._sleep, rng=self._rng)
        try:
            return json.loads(resp.data)
        finally:
            resp.release_conn()

    def _get(self) -> dict[str, Any]:
        return self._call("read lease", lambda: self._api.read_namespaced_lease(
            self.name, self.namespace, _preload_content=False))

    def _create(self, now: float) -> bool:
        body = {
            "apiVersion": "coordination.k8s.io/v1",
            "kind": "Lease",
            "metadata": {"name": self.name, "namespace": self.namespace},
            "spec": {
                "holderIdentity": self.identity,
                "leaseDurationSeconds": int(round(self.lease_duration)),
                "acquireTime": micro_time(now),
                "renewTime": micro_time(now),
                "leaseTransitions": 0,
            },
        }
        try:
            self._call("create lease", lambda: self._api.create_namespaced_lease(
                self.namespace, body, _preload_content=False))
        except KubeConflict:
            self._held = False
            return False  # another candidate created it first
        except KubeUnavailable as exc:
            log.warning("lease %s/%s: cannot create (%s)", self.namespace, self.name, exc)
            self._held = False
            return False
        self._won(now, body["spec"], took_over=True)
        return True

    def _write(self, body: dict[str, Any], now: float, *, took_over: bool) -> bool:
        try:
            self._call("update lease", lambda: self._api.replace_namespaced_lease(
                self.name, self.namespace, body, _preload_content=False))
        except (KubeConflict, KubeNotFound):
            self._held = False  # someone wrote (or deleted) in between: they won this round
            return False
        except KubeError as exc:
            if not exc.temporary:
                raise
            log.warning("lease %s/%s: cannot renew (%s)", self.namespace, self.name, exc)
            return False
        self._won(now, body["spec"], took_over=took_over)
        return True

    def _won(self, now: float, spec: dict[str, Any], *, took_over: bool) -> None:
        if took_over:
            log.info("lease %s/%s: %s is now the leader", self.namespace, self.name, self.identity)
        self._held = True
        self._last_renew = now
        self._observed_record = (
            spec.get("holderIdentity"), spec.get("leaseDurationSeconds"), spec.get("acquireTime"),
            spec.get("renewTime"), spec.get("leaseTransitions"),
        )
        self._observed_at = now
