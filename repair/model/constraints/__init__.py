"""Late constraints, as the caller states them (labels and caller-vartype values).

One module per kind, each holding the kind's class, its JSON form and its lowering
(see :mod:`flipfix.repair.model.constraints.kind`); :mod:`.registry` lists them.

Soft (added to the objective):
    ``hamming``          :class:`HammingPenalty`  weight * shape(d), d = Hamming distance to a reference
    ``extra``            :class:`ExtraTerms`      an additional linear / quadratic model
    ``decision_change``  :class:`DecisionChangePenalty`  weight * shape(d), d = distance of
                         declared decisions from reference values
Hard (must hold in the reply):
    ``fix``              :class:`FixVariables`    pin variables to values
    ``linear``           :class:`LinearConstraint` sum a_i x_i (<=, ==, >=) rhs, in the caller's vartype
    ``forbid``           :class:`ForbidAssignment` these variables may not all take these values at once
    ``forbid_values``    :class:`ForbidValues`    a decision takes none of these values
    ``allow_values``     :class:`AllowValues`     a decision takes one of these values
    ``force_value``      :class:`ForceValue`      a decision takes this value
"""

from flipfix.repair.model.constraints.allow_values import AllowValues
from flipfix.repair.model.constraints.decision_change import DISTANCES, DecisionChangePenalty
from flipfix.repair.model.constraints.extra import ExtraTerms
from flipfix.repair.model.constraints.fix import FixVariables
from flipfix.repair.model.constraints.forbid import ForbidAssignment
from flipfix.repair.model.constraints.forbid_values import ForbidValues
from flipfix.repair.model.constraints.force_value import ForceValue
from flipfix.repair.model.constraints.hamming import HammingPenalty
from flipfix.repair.model.constraints.kind import ConstraintKind
from flipfix.repair.model.constraints.linear import SENSES, LinearConstraint
from flipfix.repair.model.constraints.registry import KINDS, kind_of
from flipfix.repair.model.constraints.shapes import SHAPES, shape_table

__all__ = [
    "HammingPenalty", "ExtraTerms", "FixVariables", "LinearConstraint", "ForbidAssignment",
    "ForbidValues", "ForceValue", "AllowValues", "DecisionChangePenalty",
    "SHAPES", "SENSES", "DISTANCES", "shape_table", "ConstraintKind", "KINDS", "kind_of",
]
