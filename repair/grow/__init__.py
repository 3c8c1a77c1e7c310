"""Growing a library: robust and diverse neighbours of the stored candidates
(:mod:`.neighbours`, on the chain kernel of :mod:`.kernel`), the held-out comparison of the
original and grown libraries (:mod:`.heldout`) and a planted test model (:mod:`.planted`).

The chain kernel's numba cache is dropped when a source of this package, or of the kernels
it inlines (``kernels.metropolis``), changed (numba keys a cached kernel by its own file
only; see :mod:`flipfix.repair.kernels.cache`)."""

from pathlib import Path

from flipfix.repair.kernels import jit as _jit, metropolis as _metropolis
from flipfix.repair.kernels.cache import drop_stale

# the chain kernel inlines metropolis's random streams, acceptance rule and schedule
drop_stale(Path(__file__).resolve().parent,
           also=(_metropolis.__file__, _jit.__file__))
