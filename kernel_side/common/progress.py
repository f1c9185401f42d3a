"""One progress bar for every long-running entry point (fits, HMC, sweeps).

:func:`progress_bar` gives a ``tqdm.auto`` bar (a widget in Jupyter, text in a terminal)
when enabled and a silent stand-in otherwise, so callers update it without checking.
"""
from __future__ import annotations

from typing import Any

__all__ = ["progress_bar"]


def progress_bar(enabled: bool, total: int, desc: str, *, unit: str = "it", leave: bool = False,
                 **options: Any):
    """A progress bar over ``total`` steps, or a stand-in that does nothing.

    Parameters
    ----------
    enabled : bool
        False returns the stand-in (same methods, no output).
    total : int
        Steps the bar counts to.
    desc : str
        Label in front of the bar.
    unit : str
        What one step is ("epoch", "run", ...).
    leave : bool
        Keep the finished bar on screen.
    **options
        Passed to ``tqdm.auto.tqdm`` (e.g. ``miniters``, ``mininterval``).

    Returns
    -------
    tqdm.auto.tqdm or a silent stand-in
        Both offer ``update(n)``, ``set_postfix(**values)``, ``close()``, ``with`` and the
        ``disable`` flag (True on the stand-in), for skipping work done only for the bar.

    Examples
    --------
    >>> with progress_bar(False, 3, "demo") as bar:
    ...     bar.update(1)
    """
    if not enabled:
        return _SilentBar()
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit=unit, leave=leave, **options)


class _SilentBar:
    """What a disabled bar offers: every call does nothing (``disable`` as on tqdm's bars)."""

    disable = True

    def __enter__(self) -> _SilentBar:
        return self

    def __exit__(self, *exc: Any) -> None:
        return None

    def update(self, n: int = 1) -> None:
        return None

    def set_postfix(self, *args: Any, **kwargs: Any) -> None:
        return None

    def close(self) -> None:
        return None
