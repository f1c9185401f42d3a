"""One background thread that runs view computations, latest request wins.

A new request replaces a pending one; a result whose request was superseded while it ran
is dropped (generation counter). Errors are delivered like results, never lost: the
thread survives anything the computation or the delivery raises.
"""
from __future__ import annotations

import atexit
import threading
import time
import traceback
import weakref
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

__all__ = ["LiveWorker", "Outcome"]

_OPEN: weakref.WeakSet = weakref.WeakSet()  # workers not yet closed, for the exit hook


@atexit.register
def _close_open_workers() -> None:
    for worker in list(_OPEN):  # wait for computations in progress, however long
        worker.close(timeout=None)


@dataclass
class Outcome:
    """What the worker hands to ``deliver``.

    generation : int, the request's number (a notice carries the latest request's number when it was raised);
    result : the computation's return value, or None; error : the exception, or None;
    elapsed : seconds the computation took; kind : ``"result"`` or ``"notice"``.
    """

    generation: int
    result: Any
    error: BaseException | None
    elapsed: float
    kind: str = "result"


class LiveWorker:
    """Run ``compute(request)`` on a daemon thread and pass each fresh :class:`Outcome` to ``deliver``.

    Parameters
    ----------
    compute : callable request -> result
    deliver : callable Outcome -> None
        Called on the worker thread; exceptions it raises are reported once more as an
        error outcome, then swallowed so the thread keeps running.
    on_start : callable (generation, request) -> None, optional
        Called on the worker thread before each computation (e.g. "computing ...").
    """

    def __init__(self, compute: Callable[[Any], Any], deliver: Callable[[Outcome], None],
                 on_start: Callable[[int, Any], None] | None = None, name: str = "jostle-live"):
        self._compute = compute
        self._deliver = deliver
        self._on_start = on_start
        self._cond = threading.Condition()
        self._pending: tuple[int, Any] | None = None
        self._notices: list[tuple[int, BaseException]] = []
        self._generation = 0
        self._busy = False
        self._closed = False
        self.runs = 0
        self.dropped = 0
        self.delivery_failures: list[str] = []
        self._thread = threading.Thread(target=self._loop, name=name, daemon=True)
        self._thread.start()
        _OPEN.add(self)

    @property
    def generation(self) -> int:
        """Number of the latest request."""
        return self._generation

    def submit(self, request: Any) -> int:
        """Queue ``request``, replacing any request not yet started; returns its generation."""
        with self._cond:
            if self._closed:
                raise RuntimeError("the live worker is closed; create a new widget")
            self._generation += 1
            self._pending = (self._generation, request)
            self._cond.notify_all()
            return self._generation

    def notify(self, error: BaseException) -> None:
        """Deliver ``error`` as a notice (e.g. a rejected control value) from the worker thread.

        The notice carries the generation of the latest request at the time of the call, so a
        later request's result can tell that it supersedes the notice.
        """
        with self._cond:
            self._notices.append((self._generation, error))
            self._cond.notify_all()

    def wait(self, timeout: float | None = None) -> bool:
        """Block until nothing is pending or running; False if ``timeout`` seconds pass first."""
        deadline = None if timeout is None else time.monotonic() + timeout
        with self._cond:
            while self._busy or self._pending is not None or self._notices:
                left = None if deadline is None else deadline - time.monotonic()
                if left is not None and left <= 0:
                    return False
                self._cond.wait(left)
            return True

    def close(self, timeout: float | None = 10.0) -> None:
        """Stop the thread after the computation in progress (if any); wait up to ``timeout`` s.

        Waiting matters at interpreter exit: a daemon thread still inside a torch kernel when
        Python finalises aborts the process, so an exit hook closes every open worker.
        """
        with self._cond:
            self._closed = True
            self._pending = None
            self._cond.notify_all()
        if threading.current_thread() is not self._thread and self._thread.is_alive():
            self._thread.join(timeout)

    def _loop(self) -> None:
        while True:
            with self._cond:
                while not self._closed and self._pending is None and not self._notices:
                    self._cond.wait()
                if self._closed:
                    _OPEN.discard(self)
                    return
                notices, self._notices = self._notices, []
                job, self._pending = self._pending, None
                self._busy = True
            try:
                for generation, notice in notices:
                    self._hand_over(Outcome(generation, None, notice, 0.0, kind="notice"))
                if job is not None:
                    self._run(*job)
            finally:
                with self._cond:
                    self._busy = False
                    self._cond.notify_all()

    def _run(self, generation: int, request: Any) -> None:
        if self._on_start is not None:
            self._safely(self._on_start, generation, request)
        started = time.perf_counter()
        try:
            result, error = self._compute(request), None
        except Exception as err:  # any failure becomes a readable outcome; the thread lives on
            result, error = None, err
        self.runs += 1
        elapsed = time.perf_counter() - started
        if generation != self._generation:
            self.dropped += 1
            return
        self._hand_over(Outcome(generation, result, error, elapsed))

    def _hand_over(self, outcome: Outcome) -> None:
        if not self._safely(self._deliver, outcome) and outcome.error is None:
            failure = RuntimeError(f"showing the result failed: {self.delivery_failures[-1].splitlines()[-1]}")
            self._safely(self._deliver, Outcome(outcome.generation, None, failure, outcome.elapsed))

    def _safely(self, fn: Callable, *args: Any) -> bool:
        try:
            fn(*args)
            return True
        except Exception:
            self.delivery_failures.append(traceback.format_exc())
            return False
