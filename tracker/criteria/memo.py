"""Work shared by the criteria sets within one evaluation.

:func:`tracker.criteria.engine.evaluate` runs every set over the same ``nerves`` and ``paths`` frames, and
the sets ask for the same derived frames again and again (the motor nerve tests, the best path per nerve
test…). Inside :func:`shared`, :func:`once` computes each of those once per input frame; outside it (a set
called on its own, as the tests do) it simply computes.

The inputs are recognised by identity: within the block nobody changes them (the sets only read their
inputs). Every cached frame is kept together with the frames it was computed from, so an identity cannot
be reused by a new frame while the block lasts. Callers get a shallow copy of a cached frame, so with
copy-on-write a caller that edits its result cannot change what the next caller receives; a cached array is
made read-only.
"""

from __future__ import annotations

from collections.abc import Callable, Hashable, Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from typing import TypeVar

import numpy as np
import pandas as pd

T = TypeVar("T")

_store: ContextVar[dict | None] = ContextVar("criteria_shared_work", default=None)


@contextmanager
def shared() -> Iterator[None]:
    """Within this block, :func:`once` computes each result once (nested blocks share the outer store)."""
    if _store.get() is not None:
        yield
        return
    token = _store.set({})
    try:
        yield
    finally:
        _store.reset(token)


def once(name: Hashable, inputs: tuple, compute: Callable[[], T]) -> T:
    """``compute()``, or inside :func:`shared` the result computed earlier for the same ``name`` and the
    same input objects. ``inputs`` are the frames (or other objects) the result is derived from."""
    store = _store.get()
    if store is None:
        return compute()
    key = (name, *(id(i) for i in inputs))
    hit = store.get(key)
    if hit is None or any(a is not b for a, b in zip(hit[0], inputs)):
        hit = (inputs, compute())
        store[key] = hit
    result = hit[1]
    if isinstance(result, (pd.DataFrame, pd.Series)):
        return result.copy(deep=False)
    if isinstance(result, np.ndarray):
        result.flags.writeable = False  # shared by every caller: an edit would be a bug, so make it fail
    return result


def by_content(name: Hashable, arrays: tuple[np.ndarray, ...], compute: Callable[[], T]) -> T:
    """``compute()``, or inside :func:`shared` the result computed earlier for ``name`` over the same memory.

    For read-only arrays only (the columns ``to_numpy()`` hands out of a frame under copy-on-write): the
    sets take many shallow copies and row subsets of one frame, whose columns are then new array objects
    over the same memory, so :func:`once` (by identity) cannot recognise them. The arrays are kept with the
    result, so their memory cannot be reused by another array while the block lasts; a writable array (one
    the caller could still change) is never cached. Callers pass only columns of frames nobody edits in
    place (the nerve tests and their subsets). A cached array result is made read-only."""
    store = _store.get()
    if store is None or not all(isinstance(a, np.ndarray) and not a.flags.writeable for a in arrays):
        return compute()
    key = (name, *((a.__array_interface__["data"][0], a.shape, a.strides, a.dtype.str) for a in arrays))
    hit = store.get(key)
    if hit is None:
        hit = (tuple(arrays), compute())
        for part in hit[1] if isinstance(hit[1], tuple) else (hit[1],):
            if isinstance(part, np.ndarray):
                part.flags.writeable = False
        store[key] = hit
    return hit[1]
