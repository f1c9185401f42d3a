"""Running a block of work with a chosen number of torch intra-op threads."""
from __future__ import annotations

import contextlib
from typing import Iterator

import torch


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
