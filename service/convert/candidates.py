"""Candidates: packed assignments, batches with ids and provenance, client-side forms."""

from __future__ import annotations

from typing import Any, Mapping, Sequence

import numpy as np

from flipfix.repair.documents import forms as documents
from flipfix.repair.errors import InputError
from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.problem import Problem, finite

from flipfix.service import packing
from flipfix.service.generated import flipfix_pb2 as pb

__all__ = ["array_to_packed", "packed_to_array", "batch_to_arrays", "arrays_to_batch",
           "records_to_batches", "batch_to_candidates", "candidates_to_batch"]


def array_to_packed(X: np.ndarray) -> pb.PackedAssignments:
    """int8 (K, n) or (n,) 0/1 -> PackedAssignments (see the proto for the layout)."""
    X = np.asarray(X)
    if X.ndim == 1:
        X = X[None, :]
    return pb.PackedAssignments(count=X.shape[0], num_variables=X.shape[1],
                                bits=packing.pack_rows(X))


def packed_to_array(msg: pb.PackedAssignments, n: int, *, field: str,
                    count: int | None = None) -> np.ndarray:
    """PackedAssignments -> int8 (count, n) 0/1, checked against the problem's ``n``
    (and the expected ``count``); errors name ``field.num_variables``, ``.count``, ``.bits``."""
    if msg.num_variables != n:
        raise InputError(field + ".num_variables",
                         f"is {msg.num_variables}; the problem has {n} variables")
    if count is not None and msg.count != count:
        raise InputError(field + ".count", f"is {msg.count}; expected {count}")
    return packing.unpack_rows(msg.bits, int(msg.count), n, field=field)


def _provenance(p: pb.Provenance, field: str) -> dict:
    energy = p.reported_energy if p.HasField("reported_energy") else None
    if energy is not None:
        finite(energy, field + ".reported_energy")
    return {"source": p.source, "energy": energy, "tags": list(p.tags)}


def batch_to_arrays(problem: Problem, batch: pb.CandidateBatch, *, field: str = "candidates"
                    ) -> tuple[list[str], np.ndarray, list[dict]]:
    """CandidateBatch -> (K ids ('' = assign one), X int8 (K, n) 0/1 in ``problem.labels``
    order, K provenance dicts). ``ids`` is empty (K = ``values.count``, every id assigned)
    or has K entries (``values.count`` must agree), the non-empty ones distinct."""
    ids = list(batch.ids)
    K = len(ids) or int(batch.values.count)
    if K == 0:
        raise InputError(field + ".values.count", "is 0: at least one candidate is needed")
    ids = ids or [""] * K
    seen: set = set()
    for k, cid in enumerate(ids):
        if cid:
            if cid in seen:
                raise InputError(f"{field}.ids[{k}]", f"duplicate candidate id \"{cid}\"")
            seen.add(cid)
    X = packed_to_array(batch.values, problem.n, field=field + ".values", count=K)
    if len(batch.provenance) not in (0, K):
        raise InputError(field + ".provenance",
                         f"has {len(batch.provenance)} entries for {K} candidates (give 0 or {K})")
    provs = ([_provenance(p, f"{field}.provenance[{k}]") for k, p in enumerate(batch.provenance)]
             or [{"source": "", "energy": None, "tags": []} for _ in range(K)])
    return ids, X, provs


def _provenance_proto(prov: Mapping) -> pb.Provenance:
    p = pb.Provenance(source=prov.get("source") or "", tags=list(prov.get("tags") or ()))
    if prov.get("energy") is not None:
        p.reported_energy = float(prov["energy"])
    return p


def arrays_to_batch(ids: Sequence[str], X: np.ndarray, provenance: Sequence[Mapping] = (), *,
                    revision: int = 0) -> pb.CandidateBatch:
    """(K ids, X int8 (K, n) 0/1, 0 or K provenance dicts) -> CandidateBatch."""
    out = pb.CandidateBatch(ids=[str(i) for i in ids], values=array_to_packed(X),
                            revision=int(revision))
    if any(p.get("source") or p.get("energy") is not None or p.get("tags") for p in provenance):
        out.provenance.extend(_provenance_proto(p) for p in provenance)
    return out


def records_to_batches(recs: Sequence) -> list[pb.CandidateBatch]:
    """Stored :class:`flipfix.service.store.CandidateRecord` s -> one batch per run of one revision."""
    out: list[pb.CandidateBatch] = []
    start = 0
    for k in range(1, len(recs) + 1):
        if k == len(recs) or recs[k].revision != recs[start].revision:
            run = recs[start:k]
            n = len(run[0].labels)
            batch = pb.CandidateBatch(
                ids=[r.id for r in run], revision=int(run[0].revision),
                values=pb.PackedAssignments(count=len(run), num_variables=n,
                                            bits=b"".join(r.bits for r in run)))
            provs = [{"source": r.source, "energy": r.energy, "tags": r.tags} for r in run]
            if any(p["source"] or p["energy"] is not None or p["tags"] for p in provs):
                batch.provenance.extend(_provenance_proto(p) for p in provs)
            out.append(batch)
            start = k
    return out


def batch_to_candidates(batch: pb.CandidateBatch, problem: Problem, *,
                        field: str = "candidates") -> tuple[CandidateSet, list[dict]]:
    """A CandidateBatch (client side: ListCandidates) -> (CandidateSet, K provenance dicts);
    ``problem`` is the model of the batch's revision."""
    ids, X, provs = batch_to_arrays(problem, batch, field=field)
    return CandidateSet(CandidateSet._check_ids(ids, len(ids), field + ".ids"), X), provs


def candidates_to_batch(problem: Problem, candidates: Any, *, ids: Sequence[str] | None = None,
                        field: str = "candidates") -> pb.CandidateBatch:
    """Candidates in any form the client takes -> CandidateBatch in ``problem.labels`` order.

    ``candidates``: a :class:`CandidateSet`, a ``dimod.SampleSet`` (its energies become
    provenance), a numpy array (K, n) of values in the problem's vartype (columns in label
    order) or a candidates JSON document (list of objects). Without ``ids``, arrays and
    sample sets go without ids: the server assigns them (stored: ``c<N>`` counting on from
    ``c0``, inline: ``c<k>``, k the 0-based position, as :meth:`CandidateSet.from_sampleset`).
    """
    if isinstance(candidates, pb.CandidateBatch):
        return candidates
    if isinstance(candidates, CandidateSet):
        return arrays_to_batch(candidates.ids, candidates.X)
    if type(candidates).__name__ == "SampleSet":
        cs = CandidateSet.from_sampleset(problem, candidates, ids=ids, field=field)
        energies = np.asarray(candidates.record.energy, dtype=np.float64)
        return arrays_to_batch(cs.ids if ids is not None else [], cs.X,
                               [{"source": "dimod.SampleSet", "energy": float(e)}
                                for e in energies])
    if isinstance(candidates, np.ndarray):
        cs = CandidateSet.from_array(problem, candidates, ids=ids, field=field)
        return arrays_to_batch(cs.ids if ids is not None else [], cs.X)
    recs = documents.parse_candidate_records(candidates, problem, field=field)
    cs = CandidateSet.from_mappings(
        problem, [{"id": r["id"], "assignment": r["assignment"]} for r in recs], field=field)
    return arrays_to_batch(cs.ids, cs.X, recs)

