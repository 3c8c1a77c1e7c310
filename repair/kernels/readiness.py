"""Whether the compiled search kernels are ready, and warming them up with a notice.

numba compiles the search kernels (greedy, scoring, annealing) on their first use and
caches the machine code on disk (``__pycache__`` beside the modules, or
``NUMBA_CACHE_DIR``). On a machine's first run that compilation takes
:data:`EXPECTED_COLD_SECONDS` on two cores (a helper process compiles part of the kernels
while this one compiles the rest); it is set-up, never part of a repair's budget, and it
never runs silently:

* :func:`is_cached` says, without compiling anything, whether a previous
  :func:`warm_up` on this machine left every kernel in the cache (a stamp beside the
  cache records the numba and Python versions, a digest of the kernel sources and the
  cache index of every kernel warm-up compiled; a missing index or a changed source
  makes it False);
* :func:`warm_up` loads (or compiles) every kernel once per process; when the cache is
  cold it first calls ``notice`` with a one-line message that gives the expected time
  (:data:`EXPECTED_COLD_SECONDS`), and writes the stamp when it is done. Processes that
  share a cache (the server's pool workers) take turns: one compiles, the others wait on
  a file lock beside the cache and then load.

Entry points (the CLI's ``repair``, ``audit`` and ``demo``, the server's workers) call
:func:`warm_up` before any budget clock starts; :func:`flipfix.repair.api.repair` calls it
too, so a library caller is warned as well.
"""

from __future__ import annotations

import contextlib
import hashlib
import importlib
import json
import os
import platform
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Callable

__all__ = ["EXPECTED_COLD_SECONDS", "is_cached", "is_warm", "warm_up", "cold_notice",
           "stderr_notice"]

#: Seconds a cold compile of every search kernel takes on 2 otherwise idle cores (the wall
#: time of a cold ``warm_up()``, measured with ``python -m bench.compile`` on a quiet
#: machine: 16.6 s on 2026-12-04, bench/RESULTS.md); the notice quotes this figure. A
#: loaded machine takes longer: the measured wall time stands beside it in the table.
EXPECTED_COLD_SECONDS = 17.0

_ROOT = Path(__file__).resolve().parents[1]  # the repair package
#: sources whose kernels warm_up compiles: a change to any of them invalidates the stamp
_SOURCES = ("kernels", "solvers/greedy", "solvers/anneal.py")
_STAMP = "flipfix-kernels.ready"
_LOCKFILE = "flipfix-kernels.lock"

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

    return Path(scores._library._cache.cache_path)


def _kernel_modules() -> list:
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


#: the kernel families and the module whose ``warm_up()`` compiles (or loads) each one
FAMILIES = {"greedy": "flipfix.repair.solvers.greedy",
            "scoring": "flipfix.repair.kernels.scores",
            "annealing": "flipfix.repair.solvers.anneal",
            "grow": "flipfix.repair.grow.neighbours"}
#: the search kernels every repair needs (the growing kernel is the Grow service's)
SEARCH = ("greedy", "scoring", "annealing")


def _warm_family(name: str, *, helper: bool = False) -> None:
    """Warm family ``name`` up here; in the helper process (``helper``) annealing's kernels
    only, without the greedy pass an anneal ends with (greedy is this process's share)."""
    module = importlib.import_module(FAMILIES[name])
    if helper and name == "annealing":
        module.warm_up(greedy_pass=False)
    else:
        module.warm_up()


#: seconds each family takes to compile cold, each timed ``_warm_family`` call on a quiet
#: machine, empty cache (``annealing``: its Metropolis and region kernels, the helper's way;
#: the greedy pass an anneal ends with is greedy's); measured 2026-12-04
COMPILE_SECONDS = {"annealing": 13.1, "greedy": 11.2, "grow": 9.1, "scoring": 3.1}


def _split(families: tuple) -> tuple[tuple, tuple]:
    """(this process's families, the helper process's) for a cold compile on two cores,
    about even by :data:`COMPILE_SECONDS`: the longest first, each to the side with less so
    far. The helper always takes annealing (its Metropolis kernels, without the greedy pass
    that ends an anneal); this process then loads them and finds greedy compiled already.
    The search kernels: greedy and scoring here (14.3 s), annealing there (13.1 s); with
    grow: greedy and grow here (20.3 s), annealing and scoring there (16.2 s)."""
    if "annealing" not in families:
        return families, ()
    mine, theirs = [], ["annealing"]
    here, there = 0.0, COMPILE_SECONDS["annealing"]
    for f in sorted((f for f in families if f != "annealing"), key=COMPILE_SECONDS.get,
                    reverse=True):
        if here <= there:
            mine.append(f)
            here += COMPILE_SECONDS[f]
        else:
            theirs.append(f)
            there += COMPILE_SECONDS[f]
    return (tuple(f for f in families if f in mine), tuple(f for f in families if f in theirs))


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


#: what the helper process runs: the parent's import path, then the families it is given
#: the helper's program; its first thread blocks on stdin, whose other end only the
#: starting process holds: when that process ends (killed mid-compile, say), the read
#: returns and the helper ends too rather than compile on as an orphan
_HELPER = ("import json, os, sys, threading; "
           "sys.path[:] = json.loads(os.environ['FLIPFIX_KERNEL_PATH']); "
           "threading.Thread(target=lambda: (sys.stdin.buffer.read(), os._exit(1)), "
           "daemon=True).start(); "
           "from flipfix.repair.kernels.readiness import _warm_family; "
           "[_warm_family(f, helper=True) for f in sys.argv[1:]]")


def _helper(families: tuple):
    """A process compiling ``families`` into numba's on-disk cache (the same cache: it
    inherits the environment, ``NUMBA_CACHE_DIR`` included), or None when it cannot start.
    numba writes every cache file under a unique temporary name and renames it into place,
    so processes filling one cache never see each other's partial files. The helper ends
    when this process does (its stdin, a pipe only this process writes, closes)."""
    if not families or not sys.executable:
        return None
    env = dict(os.environ, FLIPFIX_KERNEL_PATH=json.dumps(sys.path))
    try:
        return subprocess.Popen([sys.executable, "-c", _HELPER, *families], env=env,
                                stdin=subprocess.PIPE, stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
    except OSError:
        return None


@contextlib.contextmanager
def _fill_lock():
    """Held while one process fills a cold cache: a second process warming up at the same
    time (the server's pool workers) blocks here until the first is done, then loads."""
    try:
        import fcntl

        folder = _cache_dir()
        folder.mkdir(parents=True, exist_ok=True)
        f = open(folder / _LOCKFILE, "a+b")
    except (ImportError, OSError):  # no lock on this platform or a read-only cache
        yield
        return
    with f:
        fcntl.flock(f, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(f, fcntl.LOCK_UN)


def _fill(families: tuple, parallel: bool) -> None:
    """Compile ``families`` into the on-disk cache and load them here: on two or more
    cores a helper process compiles part of them while this one compiles the rest, then
    this process loads the helper's part from the cache (and compiles whatever the helper
    did not leave there)."""
    mine, theirs = _split(families) if parallel and _cores() >= 2 else (families, ())
    helper = _helper(theirs)
    if helper is None:
        mine, theirs = families, ()
    try:
        for f in mine:
            _warm_family(f)
    except BaseException:
        if helper is not None:
            helper.kill()
        raise
    finally:
        if helper is not None:
            helper.wait()  # its exit is the event: the cache holds its families now
            helper.stdin.close()
    for f in theirs:
        _warm_family(f)


def warm_up(*, notice: Callable[[str], None] | None = stderr_notice, grow: bool = False,
            parallel: bool = True) -> float:
    """Load (or compile) every search kernel once per process; returns the seconds it took
    (0.0 when this process had already done it).

    ``notice(message)`` is called first when the cache is cold (:func:`cold_notice`);
    ``None`` stays silent. A cold compile uses two cores when there are (``parallel``): a
    helper process compiles some kernel families into the cache while this process
    compiles the others. ``grow`` warms the growing kernel too (set-up). Thread-safe:
    concurrent callers wait for the one warming up, and processes sharing a cache wait
    for the one compiling it.
    """
    families = SEARCH + (("grow",) if grow else ())
    if _WARM[0]:
        if grow:
            _warm_family("grow")
        return 0.0
    with _LOCK:
        if _WARM[0]:
            return 0.0
        t0 = time.perf_counter()
        cold = not is_cached()
        if cold and notice is not None:
            notice(cold_notice())
        for name in families:  # imports (and the greedy package's stale-cache check)
            importlib.import_module(FAMILIES[name])
        if cold:
            with _fill_lock():
                if is_cached():  # another process filled it meanwhile
                    for f in families:
                        _warm_family(f)
                else:
                    _fill(families, parallel)
                    try:
                        (_cache_dir() / _STAMP).write_text(json.dumps(
                            {"key": _key(), "indexes": _compiled_indexes(),
                             "seconds": round(time.perf_counter() - t0, 1)}),
                            encoding="utf-8")
                    except OSError:  # a read-only cache: the notice shows again next time
                        pass
        else:
            for f in families:
                _warm_family(f)
        _WARM[0] = True
        return time.perf_counter() - t0
