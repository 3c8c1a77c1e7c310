"""Tenants: whose data a call sees, and how much each tenant may store.

* Every stored problem belongs to a tenant (the token's, :mod:`flipfix.service.auth`;
  ``''`` on a server without tokens). :class:`TenantView` is the store as one tenant
  sees it: the same methods as :class:`flipfix.service.store.Store`, each bound to the
  tenant, so another tenant's problem is NOT_FOUND exactly like one that does not exist.
* :class:`Quotas` -- per-tenant limits on stored problems, candidates and bytes (models
  and packed candidates as stored), checked inside the write transaction: a write that
  would go over stores nothing and is RESOURCE_EXHAUSTED naming the quota.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

from flipfix.repair.errors import LimitError

__all__ = ["Quotas", "QuotaError", "TenantView"]


class QuotaError(LimitError):
    """A write that would take a tenant over a quota (RESOURCE_EXHAUSTED)."""


@dataclass(frozen=True)
class Quotas:
    """Per-tenant limits (None: unlimited)."""

    problems: int | None = None
    candidates: int | None = None
    bytes: int | None = None

    @property
    def any(self) -> bool:
        """Whether any quota is set (else writes skip counting the tenant's usage)."""
        return any(v is not None for v in (self.problems, self.candidates, self.bytes))

    def check(self, tenant: str, usage: dict, *, problems: int = 0, candidates: int = 0,
              size: int = 0) -> None:
        """Raise :class:`QuotaError` when adding to ``usage`` (the store's counts) goes over."""
        who = f"tenant {tenant!r}" if tenant else "this server's tenant"
        for what, add, limit, option in (("problems", problems, self.problems, "--quota-problems"),
                                         ("candidates", candidates, self.candidates,
                                          "--quota-candidates"),
                                         ("bytes", size, self.bytes, "--quota-mb")):
            if add and limit is not None and usage[what] + add > limit:
                raise QuotaError(f"quota.{what}",
                                 f"{who} would store {usage[what] + add} {what}; the quota is "
                                 f"{limit} ({option}); delete some first")


class TenantView:
    """``store`` as ``tenant`` sees it: every store method with ``tenant=`` bound."""

    _METHODS = frozenset({"create_problem", "replace_problem", "get_problem", "list_problems",
                          "delete_problem", "add_candidates", "list_candidates",
                          "remove_candidates", "keep_only", "library", "usage",
                          "model_bytes", "stored_bytes"})

    def __init__(self, store, tenant: str):
        self.store = store
        self.tenant = tenant

    def __getattr__(self, name: str):
        if name not in self._METHODS:
            raise AttributeError(f"{name!r} is not a per-tenant store method")
        return functools.partial(getattr(self.store, name), tenant=self.tenant)
