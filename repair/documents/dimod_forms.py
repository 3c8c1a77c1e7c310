"""dimod's own forms in and out: serialised BQM and SampleSet JSON, a ConstrainedQuadraticModel,
and the answer as a SampleSet.

In:

* ``bqm.to_serializable()`` written as JSON (``{"type": "BinaryQuadraticModel", ...}``)
  wherever a problem document is read (``flipfix repair``, the client);
* ``sampleset.to_serializable()`` written as JSON (``{"type": "SampleSet", ...}``)
  wherever a candidates document is read; candidate ids are ``c0, c1, ...`` in row order
  (as :meth:`flipfix.repair.model.candidates.CandidateSet.from_sampleset` names them);
* a ``dimod.ConstrainedQuadraticModel`` (:func:`from_cqm`; ``flipfix repair`` also reads the
  file ``cqm.to_file()`` writes): its objective becomes the problem, its linear
  constraints hard rows (:class:`flipfix.repair.model.constraints.LinearConstraint`, named
  by the constraint's label), its discrete constraints one-hot decisions (the values are
  the variables' labels). Quadratic and soft constraints, and variables that are not
  BINARY or SPIN, are errors naming the constraint or variable.

Out: :func:`to_sampleset` turns a repair result (the dict of
:meth:`flipfix.repair.result.RepairResult.to_dict`) into a one-row ``dimod.SampleSet``.

Errors are :class:`flipfix.repair.errors.InputError` naming the field.
"""

from __future__ import annotations

from typing import Any, Mapping

from flipfix.repair.errors import InputError
from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.model.constraints import LinearConstraint
from flipfix.repair.model.problem import Decision, Problem

__all__ = ["BQM_TYPE", "SAMPLESET_TYPE", "CQM_MAGIC", "is_dimod_document", "load_dimod",
           "as_native", "is_cqm", "from_cqm", "to_sampleset", "read_cqm_file", "read_problem", "read_candidates"]

BQM_TYPE = "BinaryQuadraticModel"
SAMPLESET_TYPE = "SampleSet"
#: the first bytes of a file written by ``ConstrainedQuadraticModel.to_file``
CQM_MAGIC = b"DIMODCQM"


def is_dimod_document(doc: Any, kind: str) -> bool:
    """Whether ``doc`` is dimod's serialisable form of ``kind`` (BQM_TYPE or SAMPLESET_TYPE)."""
    return isinstance(doc, Mapping) and doc.get("type") == kind


def load_dimod(doc: Mapping, field: str) -> Any:
    """dimod's serialisable dict -> the dimod object (BQM or SampleSet); errors name ``field``."""
    import dimod

    cls = {BQM_TYPE: dimod.BinaryQuadraticModel, SAMPLESET_TYPE: dimod.SampleSet}.get(
        doc.get("type"))
    if cls is None:
        raise InputError(f"{field}.type", f"is not a dimod {BQM_TYPE} or {SAMPLESET_TYPE}, got "
                                          f"{doc.get('type')!r}")
    if cls is dimod.BinaryQuadraticModel and not doc.get("use_bytes"):
        # dimod does not check that the arrays agree with the counts
        for key, count in (("variable_labels", "num_variables"), ("linear_biases", "num_variables"),
                           ("quadratic_biases", "num_interactions"),
                           ("quadratic_head", "num_interactions"),
                           ("quadratic_tail", "num_interactions")):
            got = doc.get(key)
            if not isinstance(got, list) or len(got) != doc.get(count):
                raise InputError(f"{field}.{key}", f"must be a list of {count} = "
                                                   f"{doc.get(count)!r} entries, got "
                                                   f"{len(got) if isinstance(got, list) else got!r}")
    try:
        return cls.from_serializable(dict(doc))
    except Exception as exc:  # noqa: BLE001 - dimod raises many kinds for a damaged document
        raise InputError(field, f"is not a readable dimod {doc['type']} document: "
                                f"{type(exc).__name__}: {exc}") from None


def is_cqm(obj: Any) -> bool:
    """Whether ``obj`` is a ``dimod.ConstrainedQuadraticModel``."""
    import dimod

    return isinstance(obj, dimod.ConstrainedQuadraticModel)


def as_native(obj: Any, field: str) -> Any:
    """dimod's serialised BQM or SampleSet (a dict read from JSON) -> the dimod object;
    anything else unchanged."""
    if is_dimod_document(obj, BQM_TYPE) or is_dimod_document(obj, SAMPLESET_TYPE):
        return load_dimod(obj, field)
    return obj


def read_problem(obj: Any, *, field: str = "problem") -> tuple[Problem, list]:
    """Any problem form -> (Problem, hard rows that come with it): a problem document, dimod's
    serialised BQM, a BQM, a ConstrainedQuadraticModel (:func:`from_cqm`) or a Problem."""
    import dimod

    from flipfix.repair.documents.forms import parse_problem

    obj = as_native(obj, field)
    if isinstance(obj, Problem):
        return obj, []
    if is_cqm(obj):
        return from_cqm(obj, field=field)
    if isinstance(obj, dimod.BinaryQuadraticModel):
        return Problem.from_bqm(obj), []
    return parse_problem(obj, field=field), []


def read_candidates(obj: Any, problem: Problem, *, field: str = "candidates") -> CandidateSet:
    """A candidates document (a list, or ``{"candidates": [...]}``), dimod's serialised
    SampleSet or a SampleSet -> CandidateSet."""
    import dimod

    from flipfix.repair.documents.forms import parse_candidates

    obj = as_native(obj, field)
    if isinstance(obj, dimod.SampleSet):
        return CandidateSet.from_sampleset(problem, obj, field=field)
    if isinstance(obj, Mapping) and "candidates" in obj:
        obj = obj["candidates"]
    return parse_candidates(obj, problem, field=field)


def read_cqm_file(data: bytes, *, field: str = "problem"):
    """The bytes of a ``cqm.to_file()`` file -> ConstrainedQuadraticModel."""
    import io

    import dimod

    try:
        return dimod.ConstrainedQuadraticModel.from_file(io.BytesIO(data))
    except Exception as exc:  # noqa: BLE001 - a damaged file raises many kinds
        raise InputError(field, f"is not a readable dimod ConstrainedQuadraticModel file: "
                                f"{type(exc).__name__}: {exc}") from None


def from_cqm(cqm, *, field: str = "cqm") -> tuple[Problem, list]:
    """A ``dimod.ConstrainedQuadraticModel`` -> (Problem, hard rows).

    The objective (every variable of the model, in its order) is the problem; each linear
    constraint is a :class:`LinearConstraint` named by its label (``lhs sense rhs``, the
    left side's offset moved to the right); each discrete constraint declares a one-hot
    decision named by its label, whose values are its variables' labels. Errors name
    ``field.variables[v]`` (not BINARY or SPIN, or a mix of both) or
    ``field.constraints[label]`` (quadratic, soft, or discrete over non-binary variables).
    """
    import dimod

    if not isinstance(cqm, dimod.ConstrainedQuadraticModel):
        raise InputError(field, f"expected a dimod.ConstrainedQuadraticModel, got "
                                f"{type(cqm).__name__}")
    labels = list(cqm.variables)
    kinds: dict = {}
    for v in labels:
        vt = cqm.vartype(v)
        if vt not in (dimod.BINARY, dimod.SPIN):
            raise InputError(f"{field}.variables[{v!r}]",
                             f"is {vt.name}; flipfix handles BINARY and SPIN variables only")
        kinds.setdefault(vt, v)
    if len(kinds) > 1:
        raise InputError(f"{field}.variables[{kinds[dimod.SPIN]!r}]",
                         f"is SPIN while {kinds[dimod.BINARY]!r} is BINARY; flipfix needs one "
                         f"vartype (convert with cqm.spin_to_binary())")
    vartype = "SPIN" if dimod.SPIN in kinds else "BINARY"
    soft = getattr(cqm, "_soft", {})
    discrete = set(cqm.discrete)
    decisions, rows = [], []
    for label, comp in cqm.constraints.items():
        f = f"{field}.constraints[{label!r}]"
        if label in soft:
            raise InputError(f, f"is soft (weight {soft[label].weight}); flipfix reads hard "
                                f"constraints only: give it as a late penalty instead")
        lhs = comp.lhs
        if not lhs.is_linear():
            raise InputError(f, f"is quadratic ({comp.to_polystring()}); flipfix's hard "
                                f"constraints are linear")
        if label in discrete:
            if vartype != "BINARY":
                raise InputError(f, "is discrete (one-hot) over SPIN variables; one-hot "
                                    "decisions need BINARY variables")
            vs = tuple(lhs.variables)
            decisions.append(Decision(str(label), "one_hot", vs,
                                      tuple(v if isinstance(v, (str, int)) else str(v)
                                            for v in vs)))
            continue
        terms = {v: float(b) for v, b in lhs.linear.items() if b}
        if not terms:
            raise InputError(f, "has no variable with a non-zero coefficient")
        sense = {"<=": "<=", ">=": ">=", "==": "=="}[comp.sense.value]
        rows.append(LinearConstraint(terms, sense, float(comp.rhs) - float(lhs.offset),
                                     name=str(label)))
    obj = cqm.objective
    problem = Problem.from_terms(
        [(v, float(obj.get_linear(v)) if v in obj.variables else 0.0) for v in labels],
        [(u, v, float(b)) for (u, v), b in obj.quadratic.items()],
        offset=float(obj.offset), vartype=vartype, labels=labels, decisions=decisions,
        field=field)
    return problem, rows


def to_sampleset(result: Mapping, problem: Problem):
    """A repair result dict (:meth:`RepairResult.to_dict`, or the client's reply) -> a
    one-row ``dimod.SampleSet`` of the answer: variables in ``problem.labels`` order and the
    problem's vartype, ``energy`` the answer's base energy (the problem's own energy, as
    dimod computes it), vectors ``cost``, ``flips`` and ``feasible``; ``info`` holds
    ``candidate_id``, ``repaired_from``, ``status``, ``method``, ``seconds`` and ``message``
    (strings go in ``info``: dimod's JSON form cannot read back a vector of strings)."""
    import dimod
    import numpy as np

    best = result["best"]
    assignment = best["assignment"]
    row = np.asarray([[assignment[v] for v in problem.labels]], dtype=np.int8)
    vt = dimod.SPIN if problem.vartype == "SPIN" else dimod.BINARY
    return dimod.SampleSet.from_samples(
        (row, list(problem.labels)), vt, energy=[float(best["base_energy"])],
        info={"candidate_id": str(best["candidate_id"]),
              "repaired_from": str(best.get("repaired_from", best["candidate_id"])),
              **{k: result.get(k) for k in ("status", "method", "seconds", "message")}},
        cost=[float(best["cost"])], flips=[int(best["flips"])],
        feasible=[bool(best["feasible"])])
