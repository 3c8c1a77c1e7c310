"""Progress of a long command on stderr: a progress bar on a terminal, plain lines elsewhere.

:class:`Progress` keeps the latest state a run reported (stage, items done of total, best
cost so far) and shows it at least every ``interval`` seconds (0.5) with the time left of
the budget, whether or not a new report came in:

* on a terminal, a bar over the budget's seconds drawn by tqdm (a maintained, widely used
  progress-bar library), the state as its postfix;
* elsewhere (a pipe, a log file, CI), one plain line per interval, e.g.
  ``flipfix repair:   1.5 s, 3.5 s left  greedy: 12/30 candidates, best cost -3.5``.

It takes the core's progress dicts (``done``, ``total``, ``best_cost``, ``phase``) and the
service's progress messages (:meth:`Progress.message`), so ``repair`` and ``audit``, in
process or with ``--server``, show the same thing. Use it as a context manager: the
ticker thread starts on entry and the last state is shown on exit.
"""

from __future__ import annotations

import math
import sys
import threading
import time
from typing import Any, TextIO

__all__ = ["Progress"]


class Progress:
    """Shows a run's progress every ``interval`` seconds until closed.

    ``what``: the command (``"repair"``, ``"audit"``); ``budget``: seconds the run may take
    (None: unknown, no time left shown); ``unit``: what ``done``/``total`` count;
    ``enabled``: False shows nothing; ``bar``: True for the tqdm bar, False for plain
    lines, None to choose by ``stream.isatty()``.
    """

    def __init__(self, what: str, *, budget: float | None, unit: str = "candidates",
                 enabled: bool = True, stream: TextIO | None = None, interval: float = 0.5,
                 bar: bool | None = None):
        self.what = what
        self.budget = budget
        self.unit = unit
        self.enabled = enabled
        self.stream = sys.stderr if stream is None else stream
        self.interval = interval
        if bar is None:
            bar = bool(getattr(self.stream, "isatty", lambda: False)())
        self._use_bar = bar
        self._lock = threading.Lock()
        self._state: dict = {"phase": "starting", "done": 0, "total": 0, "best_cost": None}
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._bar = None
        self.t0 = time.monotonic()
        self.lines = 0  # plain lines written (tests read it)

    # ------------------------------------------------------------- reports
    def __call__(self, info: Any) -> None:
        """A core progress dict (``done``, ``total``, ``best_cost``: None for none yet,
        ``phase``; any may be missing) or a service progress message."""
        if not isinstance(info, dict):
            self.message(info)
            return
        with self._lock:
            st = self._state
            if info.get("phase"):
                st["phase"] = str(info["phase"])
            for key in ("done", "total"):
                if info.get(key) is not None:
                    st[key] = int(info[key])
            best = info.get("best_cost")
            if best is not None and math.isfinite(best):  # keep the last known best
                st["best_cost"] = float(best)

    def message(self, msg: Any) -> None:
        """A service progress message (``RepairProgress`` or a stress-test progress)."""
        best = msg.best_cost if msg.HasField("best_cost") else None
        from flipfix.service.convert import PHASE_NAMES

        phase = getattr(msg, "current_phase", 0)
        self({"done": msg.done, "total": msg.total, "best_cost": best,
              "phase": PHASE_NAMES.get(phase, "") if isinstance(phase, int) else str(phase)})

    def stage(self, phase: str, *, done: int = 0, total: int = 0) -> None:
        """A new stage of the command, with its own count (the best cost is kept)."""
        with self._lock:
            self._state.update(phase=phase, done=done, total=total)

    # ------------------------------------------------------------- showing
    def text(self) -> str:
        """The state as one line (without the time)."""
        with self._lock:
            st = dict(self._state)
        best = "-" if st["best_cost"] is None else f"{st['best_cost']:.6g}"
        count = f"{st['done']}/{st['total']} {self.unit}" if st["total"] else f"0 {self.unit} yet"
        return f"{st['phase']}: {count}, best cost {best}"

    def _left(self, elapsed: float) -> str:
        if self.budget is None:
            return ""
        return f", {max(0.0, self.budget - elapsed):.1f} s left"

    def _show(self) -> None:
        elapsed = time.monotonic() - self.t0
        if self._bar is not None:
            total = self._bar.total or 0
            self._bar.n = min(elapsed, total) if total else elapsed
            self._bar.set_postfix_str(self.text() + self._left(elapsed), refresh=False)
            self._bar.refresh()
            return
        print(f"flipfix {self.what}: {elapsed:6.1f} s{self._left(elapsed)}  {self.text()}",
              file=self.stream, flush=True)
        self.lines += 1

    def _tick(self) -> None:
        while not self._stop.wait(self.interval):
            self._show()

    def __enter__(self) -> "Progress":
        if not self.enabled:
            return self
        self.t0 = time.monotonic()
        if self._use_bar:
            from tqdm import tqdm

            self._bar = tqdm(total=self.budget, file=self.stream, unit="s", leave=True,
                             desc=f"flipfix {self.what}", dynamic_ncols=True,
                             bar_format="{desc}: {bar} {n:.1f}/{total:.1f} s {postfix}"
                             if self.budget else "{desc}: {n:.1f} s {postfix}")
        self._thread = threading.Thread(target=self._tick, daemon=True, name="flipfix-progress")
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        if self._thread is None:
            return
        self._stop.set()
        self._thread.join()
        self._thread = None
        self._show()
        if self._bar is not None:
            self._bar.close()
            self._bar = None
