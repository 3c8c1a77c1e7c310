"""flipfix repair core: late-constraint repair of binary quadratic model solutions.

Pure numerics (numpy, ortools, dimod, numba); this package never imports grpc or protobuf.
"""

from flipfix.repair.model.candidates import CandidateSet
from flipfix.repair.errors import InputError, LimitError
from flipfix.repair.model.problem import Decision, Problem

__all__ = ["Problem", "Decision", "CandidateSet", "InputError", "LimitError", "repair"]


def repair(*args, **kwargs):
    """See :func:`flipfix.repair.api.repair` (imported lazily to keep start-up light)."""
    from flipfix.repair.api import repair as _repair

    return _repair(*args, **kwargs)
