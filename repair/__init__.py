"""flipfix repair core: late-constraint repair of binary quadratic model solutions.

Pure numerics (numpy, ortools, dimod, numba); this package never imports grpc or protobuf.
"""

from .candidates import CandidateSet
from .errors import InputError, LimitError
from .model import Decision, Problem

__all__ = ["Problem", "Decision", "CandidateSet", "InputError", "LimitError", "repair"]


def repair(*args, **kwargs):
    """See :func:`repair.api.repair` (imported lazily to keep start-up light)."""
    from .api import repair as _repair

    return _repair(*args, **kwargs)
