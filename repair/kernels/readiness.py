"""Whether the compiled search kernels are ready, and warming them up with a notice.

numba compiles the search kernels (greedy, scoring, annealing) on their first use and
caches the machine code on disk (``__pycache__`` beside the modules, or
``NUMBA_CACHE_DIR``). On a machine's first run that compilation takes about a minute;
it is set-up, never part of a repair's budget, and it never runs silently:

* :func:`is_cached` says, without compiling anything, whether a previous
  :func:`warm_up` on this machine left every kernel in the cache (a stamp beside the
  cache records the numba and Python versions, a digest of the kernel sources and the
  cache index of every kernel warm-up compiled; a missing index or a changed source
  makes it False);
* :func:`warm_up` loads (or compiles) every kernel once per process; when the cache is
  cold it first calls ``notice`` with a one-line message that gives the expected time
  (:data:`EXPECTED_COLD_SECONDS`), and writes the stamp when it is done.

Entry points (the CLI's ``repair``, ``audit`` and ``demo``, the server's workers) call
:func:`warm_up` before any budget clock starts; :func:`flipfix.repair.api.repair` calls it
too, so a library caller is warned as well.
"""

from __future__ import annotations

import hashlib
import json
import platform
import sys
import threading
import time
from pathlib import Path
from typing import Callable

__all__ = ["EXPECTED_COLD_SECONDS", "is_cached", "is_warm", "warm_up", "cold_notice",
           "stderr_notice"]

#: Seconds a cold compile of every search kernel took on 2 cores: about 65 s in a
#: clean-clone CI run (DEVELOPERS.md, performance notes); the notice quotes this figure.
EXPECTED_COLD_SECONDS = 65.0

_ROOT = Path(__file__).resolve().parents[1]  # the repair package
#: sources whose kernels warm_up compiles: a change to any of them invalidates the stamp
_SOURCES = ("kernels", "solvers/greedy", "solvers/anneal.py")
_STAMP = "flipfix-kernels.ready"

_LOCK = threading.Lock()
_WARM = [False]


def cold_notice() -> str:
    """The one-line message printed before a cold compile."""
    return (f"flipfix: compiling the search kernels for this machine, once (about "
            f"{EXPECTED_COLD_SECONDS:.0f} s on 2 cores; later runs load them from the cache "
            f"in {_cache_dir()}); this time is not counted against any time budget")


def stderr_notice(message: str) -> None:
    """A ``notice`` callable that prints ``message`` on stderr at once."""
    print(message, file=sys.stderr, flush=True)


def _digest() -> str:
    h = hashlib.sha256()
    for item in _SOURCES:
        path = _ROOT / item
        files = sorted(path.glob("*.py")) if path.is_dir() else [path]
        for f in files:
            h.update(str(f.relative_to(_ROOT)).encode())
            h.update(f.read_bytes())
    return h.hexdigest()


def _key() -> dict:
    import numba

    return {"numba": numba.__version__, "python": platform.python_version(),
            "sources": _digest()}


def _cache_dir() -> Path:
    """Where numba keeps the scoring kernels' cache (the stamp lives there too)."""
    from flipfix.repair.kernels import scores

    return Path(scores._total._cache.cache_path)


def _kernel_modules() -> list:
    import importlib

    from flipfix.repair.solvers import greedy

    names = ["flipfix.repair.kernels.scores", "flipfix.repair.kernels.energy",
             "flipfix.repair.kernels.metropolis", "flipfix.repair.solvers.anneal"]
    names += [f"flipfix.repair.solvers.greedy.{p.stem}"
              for p in sorted(Path(greedy.__file__).parent.glob("*.py"))
              if p.stem != "__init__"]
    return [importlib.import_module(n) for n in names]


def _compiled_indexes() -> list[str]:
    """The cache index file of every cached kernel this process has compiled or loaded."""
    from numba.core.caching import FunctionCache
    from numba.core.registry import CPUDispatcher

    out = set()
    for mod in _kernel_modules():
        for obj in vars(mod).values():
            if isinstance(obj, CPUDispatcher) and obj.signatures \
                    and isinstance(getattr(obj, "_cache", None), FunctionCache):
                out.add(str(obj._cache._cache_file._index_path))
    return sorted(out)


def is_cached() -> bool:
    """True when a completed :func:`warm_up` left every kernel in the on-disk cache for
    the present sources, numba and Python (nothing is compiled to find out)."""
    try:
        stamp = json.loads((_cache_dir() / _STAMP).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    if not isinstance(stamp, dict) or stamp.get("key") != _key():
        return False
    indexes = stamp.get("indexes")
    return bool(indexes) and all(Path(p).is_file() for p in indexes)


def is_warm() -> bool:
    """True once :func:`warm_up` has completed in this process."""
    return _WARM[0]


def warm_up(*, notice: Callable[[str], None] | None = stderr_notice) -> float:
    """Load (or compile) every search kernel once per process; returns the seconds it took
    (0.0 when this process had already done it).

    ``notice(message)`` is called first when the cache is cold (:func:`cold_notice`);
    ``None`` stays silent. Thread-safe: concurrent callers wait for the one warming up.
    """
    if _WARM[0]:
        return 0.0
    with _LOCK:
        if _WARM[0]:
            return 0.0
        t0 = time.perf_counter()
        cold = not is_cached()
        if cold and notice is not None:
            notice(cold_notice())
        from flipfix.repair.kernels import scores
        from flipfix.repair.solvers import anneal, greedy

        greedy.warm_up()
        scores.warm_up()
        anneal.warm_up()
        if cold:
            try:
                (_cache_dir() / _STAMP).write_text(json.dumps(
                    {"key": _key(), "indexes": _compiled_indexes(),
                     "seconds": round(time.perf_counter() - t0, 1)}), encoding="utf-8")
            except OSError:  # a read-only cache: the notice shows again next time
                pass
        _WARM[0] = True
        return time.perf_counter() - t0
