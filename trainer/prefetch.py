"""Run an iterator on a background thread, a bounded number of items ahead of its consumer.

Reading and hashing the next batch overlaps with the solver's (or the scorer's) work on the current
one. The two run in parallel because the reading path spends its time where the GIL is released:
Parquet decoding and Arrow compute kernels run in pyarrow's C++ without the GIL, and the reader's
numba functions are compiled with ``nogil=True``.

The consumer sees exactly the items, order and exceptions of the plain iterator; only the thread
that computes them differs. Prefetching (double buffering) is common practice for input pipelines.
"""

from __future__ import annotations

import collections
import threading
from typing import Iterable, Iterator, TypeVar

T = TypeVar("T")

_ITEM, _END, _ERROR = "item", "end", "error"


class _Handoff:
    """What the producer thread and the consumer share: finished outcomes ``(kind, value)`` in order,
    at most ``depth`` of them, and the consumer's stop request, under one condition variable."""

    def __init__(self, depth: int):
        self.depth = depth
        self.ready: collections.deque = collections.deque()
        self.cond = threading.Condition()
        self.stopping = False

    def wait_for_room(self) -> bool:
        """Producer: block until fewer than ``depth`` outcomes wait; False once the consumer stopped."""
        with self.cond:
            self.cond.wait_for(lambda: self.stopping or len(self.ready) < self.depth)
            return not self.stopping

    def put(self, kind: str, value) -> None:
        """Producer: hand over one outcome."""
        with self.cond:
            self.ready.append((kind, value))
            self.cond.notify_all()

    def take(self) -> tuple[str, object]:
        """Consumer: block until an outcome is ready and return the oldest."""
        with self.cond:
            self.cond.wait_for(lambda: self.ready)
            outcome = self.ready.popleft()
            self.cond.notify_all()
            return outcome

    def stop(self) -> None:
        """Consumer: drop the outcomes not taken and tell the producer to stop."""
        with self.cond:
            self.stopping = True
            self.ready.clear()
            self.cond.notify_all()


def _produce(source: Iterator, handoff: _Handoff) -> None:
    """The thread's body: ask ``source`` for an item whenever there is room, until it ends, raises or
    the consumer stops; then close ``source`` (a generator runs its own cleanup in this thread)."""
    try:
        while handoff.wait_for_room():
            try:
                handoff.put(_ITEM, next(source))
            except StopIteration:
                handoff.put(_END, None)
                return
            except BaseException as exc:
                handoff.put(_ERROR, exc)
                return
    finally:
        close = getattr(source, "close", None)
        if close is not None:
            close()


def _prefetched(source: Iterator[T], depth: int) -> Iterator[T]:
    handoff = _Handoff(depth)
    thread = threading.Thread(target=_produce, args=(source, handoff), name="hashcurve-prefetch", daemon=True)
    thread.start()
    try:
        while True:
            kind, value = handoff.take()
            if kind == _ITEM:
                yield value
            elif kind == _END:
                return
            else:
                raise value
    finally:
        handoff.stop()
        # An abandoned generator caught in a reference cycle may be collected on the producer thread
        # itself, which then stops at its next check instead of joining itself.
        if thread is not threading.current_thread():
            thread.join()


def prefetch(source: Iterable[T], depth: int = 1) -> Iterator[T]:
    """Yield the items of ``source`` in order while one daemon thread produces the next ones.

    The thread starts at the first ``next()`` and asks ``source`` for an item only while fewer than
    ``depth`` (>= 1) finished items wait, so at most ``depth`` items exist beyond the one the consumer
    holds (with ``depth=1``, as many as the plain loop keeps at its peak). An exception raised by
    ``source`` is raised here, the same object (type, message, the producer's traceback), after the
    items produced before it; the thread has ended by then.

    When the consumer stops early (``close()``, an exception thrown in, or the generator collected),
    the waiting items are dropped, the thread finishes the item it is computing, closes ``source`` and
    is joined before the cleanup returns. To make that cleanup immediate on ``break`` or on an
    exception in the loop body, iterate inside ``with contextlib.closing(prefetch(...)) as items:``.

    Returns a generator. Raises ValueError for ``depth`` < 1; whatever ``iter(source)`` raises.
    """
    if depth < 1:
        raise ValueError(f"prefetch depth must be >= 1, got {depth}")
    return _prefetched(iter(source), depth)
