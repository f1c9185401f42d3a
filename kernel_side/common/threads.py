"""The thread policy: how many torch intra-op threads a block of work runs with.

Every entry point that takes ``threads`` (attacks, fits, sweep runs) resolves it with
:func:`threads_for` and runs under :func:`torch_threads`, so the rule is written once:

- ``"auto"``: one thread on the CPU when the work is small, else torch's own setting.
  Small work is a long chain of tiny kernels; on a shared 2-core machine each parallel
  kernel waits at a thread barrier whenever the other core is busy, and one thread
  measured up to 25x faster (benchmarks/bench_attacks.py). On other devices the setting
  is left alone, since host threads there only launch kernels.
- an integer ``k >= 1``: exactly ``k`` threads.
- ``None``: torch's setting is left alone.
"""
from __future__ import annotations

import contextlib
from collections.abc import Iterator
from typing import Any

import torch

from jostle.common.checks import check_int, show_value

__all__ = ["SMALL_WORK", "threads_for", "torch_threads"]

#: Floats one evaluation may touch before ``"auto"`` keeps torch's own thread count: covers
#: a live single point and the 100-point, 100-member attack of benchmarks/bench_attacks.py.
SMALL_WORK = 2**22


def threads_for(threads: Any, work_size: int, device: Any = "cpu", *, small: int = SMALL_WORK) -> int | None:
    """The intra-op thread count for a block of work, or None to leave torch's setting alone.

    Parameters
    ----------
    threads : "auto", int or None
        The caller's request (see the module docstring for the rule).
    work_size : int
        Size of one evaluation of the work (floats touched, or elements trained).
    device : str or torch.device
        Where the work runs; ``"auto"`` picks one thread only on the CPU.
    small : int
        ``"auto"`` picks one thread when ``work_size <= small``.

    Returns
    -------
    int or None

    Examples
    --------
    >>> threads_for("auto", 1000), threads_for(3, 10**9), threads_for(None, 10)
    (1, 3, None)
    """
    if isinstance(threads, str):
        if threads != "auto":
            raise ValueError(f"threads must be 'auto', an integer >= 1 or None; got {show_value(threads)}")
        return 1 if torch.device(device).type == "cpu" and work_size <= small else None
    if threads is None:
        return None
    return check_int("threads", threads, low=1)


@contextlib.contextmanager
def torch_threads(threads: int | None) -> Iterator[None]:
    """Run the enclosed block with ``threads`` intra-op threads, then restore the setting.

    ``None`` (or the current count) leaves torch's setting alone.
    """
    before = torch.get_num_threads()
    if threads is None or threads == before:
        yield
        return
    torch.set_num_threads(threads)
    try:
        yield
    finally:
        torch.set_num_threads(before)
