"""The latest-wins worker: coalescing, stale-result dropping, errors never lost."""
from __future__ import annotations

import threading
import time

import pytest

from jostle.live.engine import LiveWorker


class Recorder:
    def __init__(self):
        self.outcomes = []
        self.lock = threading.Lock()

    def __call__(self, outcome):
        with self.lock:
            self.outcomes.append(outcome)


def test_a_new_request_replaces_the_pending_one():
    gate = threading.Event()
    seen = []

    def compute(request):
        seen.append(request)
        if request == "first":
            gate.wait(5)
        return request.upper()

    got = Recorder()
    worker = LiveWorker(compute, got)
    worker.submit("first")
    time.sleep(0.05)  # let "first" start
    for k in range(50):
        worker.submit(f"r{k}")
    gate.set()
    assert worker.wait(5)
    assert seen == ["first", "r49"]  # r0..r48 were superseded before they started
    # "first" finished after newer requests came in, so its result is stale and dropped
    assert [o.result for o in got.outcomes] == ["R49"]
    assert worker.dropped == 1 and worker.runs == 2
    worker.close()


def test_errors_are_delivered_and_the_thread_survives():
    def compute(request):
        if request < 0:
            raise ValueError(f"request must be >= 0; got {request}")
        return request * 2

    got = Recorder()
    worker = LiveWorker(compute, got)
    worker.submit(-1)
    assert worker.wait(5)
    worker.submit(3)
    assert worker.wait(5)
    assert isinstance(got.outcomes[0].error, ValueError)
    assert "request must be >= 0; got -1" in str(got.outcomes[0].error)
    assert got.outcomes[1].result == 6 and got.outcomes[1].error is None
    worker.notify(ValueError("budget must be a finite float >= 0; got -1"))
    assert worker.wait(5)
    assert got.outcomes[2].kind == "notice" and "budget" in str(got.outcomes[2].error)
    worker.close()


def test_a_failing_delivery_is_reported_once_and_does_not_stop_the_worker():
    calls = []

    def deliver(outcome):
        calls.append(outcome)
        if outcome.error is None and outcome.result == "bad":
            raise RuntimeError("trait refused the value")

    worker = LiveWorker(lambda r: r, deliver)
    worker.submit("bad")
    assert worker.wait(5)
    worker.submit("good")
    assert worker.wait(5)
    assert [c.result for c in calls] == ["bad", None, "good"]
    assert "showing the result failed: RuntimeError: trait refused the value" in str(calls[1].error)
    assert len(worker.delivery_failures) == 1
    worker.close()


def test_wait_times_out_and_closed_worker_refuses_requests():
    gate = threading.Event()
    worker = LiveWorker(lambda r: gate.wait(5), lambda o: None)
    worker.submit(1)
    assert worker.wait(0.05) is False
    gate.set()
    assert worker.wait(5)
    worker.close()
    with pytest.raises(RuntimeError, match="the live worker is closed"):
        worker.submit(2)


def test_generations_count_requests():
    worker = LiveWorker(lambda r: r, lambda o: None)
    assert [worker.submit(k) for k in range(3)] == [1, 2, 3]
    assert worker.wait(5) and worker.generation == 3
    worker.close()


def test_a_notice_carries_the_generation_current_when_it_was_raised():
    gate = threading.Event()
    got = Recorder()
    worker = LiveWorker(lambda r: gate.wait(5) and r, got)
    worker.submit("a")                      # generation 1, starts and blocks
    time.sleep(0.05)
    worker.notify(ValueError("rejected"))   # raised while generation 1 is the latest
    worker.submit("b")                      # generation 2
    gate.set()
    assert worker.wait(5)
    notices = [o for o in got.outcomes if o.kind == "notice"]
    assert [o.generation for o in notices] == [1]
    assert [o.generation for o in got.outcomes if o.kind == "result"] == [2]
    worker.close()


_EXIT_SCRIPT = """
import sys, time, torch
from jostle.live.engine import LiveWorker
started = []
def compute(request):
    started.append(1)
    a, end = torch.randn(300, 300), time.monotonic() + 1.0
    while time.monotonic() < end:  # inside torch kernels when the interpreter wants to exit
        a = torch.tanh(a @ a)
    return float(a.sum())
worker = LiveWorker(compute, lambda outcome: None)
worker.submit(1)
while not started:
    time.sleep(0.01)
if sys.argv[1] == "close":
    worker.close()
"""


@pytest.mark.parametrize("how", ["close", "exit"])
def test_python_exits_cleanly_while_a_computation_runs(tmp_path, how):
    # A daemon thread still inside a torch kernel at finalisation aborts the process
    # ("terminate called without an active exception", rc 134): close() and the exit hook wait.
    import subprocess
    import sys

    script = tmp_path / "exit_while_computing.py"
    script.write_text(_EXIT_SCRIPT)
    done = subprocess.run([sys.executable, str(script), how], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
