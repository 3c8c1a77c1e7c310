"""A library of candidate solutions aligned to a problem's variable order."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from flipfix.repair.errors import InputError
from flipfix.repair.model.problem import Problem

__all__ = ["CandidateSet"]


@dataclass(frozen=True, eq=False)
class CandidateSet:
    """K candidates of a problem.

    Attributes:
        ids: tuple of K distinct string ids.
        X: int8 (K, n) assignments in 0/1 form, columns in ``problem.labels`` order.
    """

    ids: tuple
    X: np.ndarray

    def __len__(self) -> int:
        return len(self.ids)

    @staticmethod
    def _check_ids(ids: Sequence[Any], k: int, field: str) -> tuple:
        if len(ids) != k:
            raise InputError(field, f"has {len(ids)} ids for {k} candidates")
        out = []
        seen = set()
        for pos, cid in enumerate(ids):
            if not isinstance(cid, (str, int)) or isinstance(cid, bool) or str(cid) == "":
                raise InputError(f"{field}[{pos}]", f"id {cid!r} must be a non-empty string")
            cid = str(cid)
            if cid in seen:
                raise InputError(f"{field}[{pos}]", f"duplicate candidate id {cid!r}")
            seen.add(cid)
            out.append(cid)
        return tuple(out)

    @classmethod
    def from_array(
        cls, problem: Problem, values, *, ids: Sequence[Any] | None = None,
        field: str = "candidates",
    ) -> "CandidateSet":
        """From an array (K, n) of values in the problem's vartype, columns in label order."""
        arr = np.asarray(values)
        if arr.ndim == 1:
            arr = arr[None, :]
        if arr.ndim != 2 or arr.shape[1] != problem.n:
            raise InputError(field, f"must have shape (K, {problem.n}), got {arr.shape}")
        if arr.shape[0] == 0:
            raise InputError(field, "is empty: at least one candidate is needed")
        X = problem.from_caller(arr, field)
        ids = [f"c{k}" for k in range(arr.shape[0])] if ids is None else list(ids)
        return cls(cls._check_ids(ids, arr.shape[0], field + ".ids"), np.ascontiguousarray(X))

    @classmethod
    def from_mappings(
        cls, problem: Problem, items: Iterable[Any], *, field: str = "candidates",
    ) -> "CandidateSet":
        """From ``[{"id": ..., "assignment": {label: value}}, ...]`` or ``[(id, {label: value})]``.

        Every candidate must assign every variable of the problem, and nothing else.
        """
        ids: list = []
        rows: list = []
        for k, item in enumerate(items):
            f = f"{field}[{k}]"
            if isinstance(item, Mapping):
                if "assignment" not in item:
                    raise InputError(f + ".assignment", "is missing")
                cid, assignment = item.get("id", f"c{k}"), item["assignment"]
            elif isinstance(item, (tuple, list)) and len(item) == 2:
                cid, assignment = item
            else:
                raise InputError(f, "must be {'id': ..., 'assignment': {label: value}}")
            if not isinstance(assignment, Mapping):
                raise InputError(f + ".assignment", "must map labels to values")
            row = np.zeros(problem.n, dtype=np.int8)
            seen = np.zeros(problem.n, dtype=bool)
            for lab, val in assignment.items():
                i = problem.lookup(lab, f"{f}.assignment[{lab!r}]")
                row[i] = problem.value_to_bit(val, f"{f}.assignment[{lab!r}]")
                seen[i] = True
            if not seen.all():
                missing = problem.labels[int(np.argmin(seen))]
                raise InputError(f + ".assignment", f"misses variable {missing!r}")
            ids.append(cid)
            rows.append(row)
        if not rows:
            raise InputError(field, "is empty: at least one candidate is needed")
        return cls(cls._check_ids(ids, len(rows), field), np.vstack(rows).astype(np.int8))

    @classmethod
    def from_sampleset(
        cls, problem: Problem, sampleset, *, ids: Sequence[Any] | None = None,
        field: str = "sampleset",
    ) -> "CandidateSet":
        """From a ``dimod.SampleSet`` whose vartype matches the problem's."""
        import dimod

        if not isinstance(sampleset, dimod.SampleSet):
            raise InputError(field, f"expected a dimod.SampleSet, got {type(sampleset).__name__}")
        want = dimod.SPIN if problem.vartype == "SPIN" else dimod.BINARY
        if sampleset.vartype is not want:
            sampleset = sampleset.change_vartype(want, inplace=False)
        missing = set(problem.labels) - set(sampleset.variables)
        if missing:
            raise InputError(field, f"misses variable {sorted(map(str, missing))[0]!r}")
        extra = set(sampleset.variables) - set(problem.labels)
        if extra:
            raise InputError(field, f"has unknown variable {sorted(map(str, extra))[0]!r}")
        cols = [sampleset.variables.index(lab) for lab in problem.labels]
        arr = np.asarray(sampleset.record.sample)[:, cols]
        return cls.from_array(problem, arr, ids=ids, field=field)

    def assignments(self, problem: Problem) -> list[dict]:
        """Candidates as label -> value dicts in the caller's vartype."""
        vals = problem.to_caller(self.X)
        return [dict(zip(problem.labels, map(int, row))) for row in vals]
