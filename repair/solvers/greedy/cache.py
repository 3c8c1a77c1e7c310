"""Keep numba's on-disk kernel caches in step with this package's sources.

numba keys a cached kernel by its own source file (time stamp and size) only. The greedy
kernels call into their sibling modules, and a caller's cached machine code holds its
callees' code: after an edit to a callee's module, the callers' caches would still load
the old code. :func:`drop_stale` removes every cached kernel of the package when any of
its sources changed since the caches were written.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

__all__ = ["drop_stale"]

_HERE = Path(__file__).resolve().parent


def drop_stale(here: Path = _HERE) -> None:
    """Delete ``here/__pycache__``'s numba caches (``*.nbi``, ``*.nbc``) unless they were
    written from the package's present sources (a digest kept beside them). A read-only
    install (its caches live elsewhere, its sources never change) is left alone."""
    digest = hashlib.sha256()
    for path in sorted(here.glob("*.py")):
        digest.update(path.name.encode())
        digest.update(path.read_bytes())
    want = digest.hexdigest()
    cache = here / "__pycache__"
    stamp = cache / "kernels.sha256"
    try:
        if stamp.read_text() == want:
            return
    except OSError:
        pass
    try:
        cache.mkdir(exist_ok=True)
        for path in list(cache.glob("*.nbi")) + list(cache.glob("*.nbc")):
            path.unlink(missing_ok=True)
        stamp.write_text(want)
    except OSError:
        return
