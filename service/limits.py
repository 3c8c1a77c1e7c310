"""The server's per-request size limits, checked on the request before it is converted."""

from __future__ import annotations

from dataclasses import dataclass

from flipfix.repair.errors import LimitError

from flipfix.service.generated import flipfix_pb2 as pb

__all__ = ["Limits"]


@dataclass(frozen=True)
class Limits:
    """Per-request size limits (None: unlimited); exceeding one is a LimitError naming the field."""

    max_variables: int | None = None
    max_candidates: int | None = None
    max_constraints: int | None = None
    max_couplings: int | None = None

    @staticmethod
    def _check(count: int, limit: int | None, field: str, what: str) -> None:
        if limit is not None and count > limit:
            raise LimitError(field, f"{count} {what} exceed the limit of {limit}")

    def model(self, model: pb.ProblemModel, field: str) -> None:
        """The model's couplings (quadratic terms as sent, checked first: counting them costs
        nothing) and variables (its labels when given, else the distinct labels of its terms)."""
        if model.HasField("indexed"):
            self._check(len(model.indexed.u), self.max_couplings, field + ".indexed.u",
                        "couplings")
        self._check(len(model.quadratic), self.max_couplings, field + ".quadratic", "couplings")
        if len(model.labels) or model.HasField("indexed"):
            n = len(model.labels)
        else:
            labels = [t.label for t in model.linear] + [x for t in model.quadratic for x in (t.u, t.v)]
            n = len({lab.SerializeToString(deterministic=True) for lab in labels})
        self._check(n, self.max_variables, field, "variables")

    def candidates(self, batch: pb.CandidateBatch, field: str) -> None:
        self._check(len(batch.ids), self.max_candidates, field, "candidates")

    def constraints(self, constraints, field: str) -> None:
        self._check(len(constraints), self.max_constraints, field, "constraints")
