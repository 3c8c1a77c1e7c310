"""Keep numba's on-disk kernel caches in step with their sources.

numba keys a cached kernel by its own source file (time stamp and size) only. Kernels
call into other modules (the greedy package's siblings, :mod:`flipfix.repair.kernels.rows`),
and a caller's cached machine code holds its callees' code: after an edit to a callee's
module, the callers' caches would still load the old code. :func:`drop_stale` removes every
cached kernel of a folder when any of its sources (or ``also``) changed since the caches
were written.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

__all__ = ["drop_stale"]

_HERE = Path(__file__).resolve().parent


def drop_stale(here: Path = _HERE, also: tuple = ()) -> None:
    """Delete ``here/__pycache__``'s numba caches (``*.nbi``, ``*.nbc``) unless they were
    written from the present sources of ``here`` and of the files ``also`` (a digest kept
    beside them). A read-only install (its caches live elsewhere, its sources never change)
    is left alone."""
    digest = hashlib.sha256()
    for path in sorted(here.glob("*.py")) + [Path(p) for p in also]:
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
