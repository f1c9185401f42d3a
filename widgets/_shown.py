"""The explorers a session has made, in the order it made them, for reports of a whole notebook.

Each explorer notes itself here when it is built; :func:`open_views` gives the ones still
open (not closed), leaving out those that live inside another (a Comparison's columns, the run
a SweepExplorer opened), since the outer one reports them.
"""
from __future__ import annotations

import itertools
import weakref
from typing import Any

_MADE: weakref.WeakValueDictionary = weakref.WeakValueDictionary()
_ORDER = itertools.count()


def remember(view: Any) -> None:
    """Note a newly built explorer (held weakly: a forgotten explorer is not kept alive)."""
    _MADE[next(_ORDER)] = view


def open_views() -> list[Any]:
    """Explorers built so far and not closed, outermost only, oldest first."""
    views = [view for _, view in sorted(_MADE.items()) if getattr(view, "comm", None) is not None]
    inner = {id(part) for view in views for part in _parts(view)}
    return [view for view in views if id(view) not in inner]


def _parts(view: Any) -> list[Any]:
    detail = getattr(view, "detail", None)
    return [*getattr(view, "explorers", ()), *(getattr(detail, "children", ()) if detail is not None else ())]
