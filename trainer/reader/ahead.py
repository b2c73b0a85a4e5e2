"""Reading ahead: the next batches of a pass read and hashed on a thread while the solver steps.

The reader's Parquet decoding (pyarrow) and hashing kernels (numba, ``nogil``) release the GIL, so on
a machine with a spare core the reading of batch t + 1 overlaps the solver's step on batch t. The
batches are the same, in the same order, as read inline; only who reads them changes.
"""

from __future__ import annotations

import queue
import threading

#: Batches read ahead at most (each is at most 16 x --batch-rows rows).
DEPTH = 2


def read_ahead(batches, after, depth: int = DEPTH):
    """Yield the batches of an iterator, reading them on a thread once ``after()`` is true.

    Until then each batch is read inline (so state the reading updates, such as the recorded bucket
    examples, changes only between batches the caller sees, as without reading ahead); from the first
    batch after which ``after()`` holds, a thread reads up to ``depth`` batches ahead. An exception of
    the reader is raised here, in the caller's thread, at the batch where it occurred. Closing the
    generator (the caller stops early) stops the thread and closes ``batches``.

    Parameters
    ----------
    batches : iterator
        The pass's batches.
    after : callable
        ``after() -> bool``, polled after each batch read inline.
    depth : int, default DEPTH
        Batches read ahead at most.

    Yields
    ------
    The batches of ``batches``, in order.
    """
    it = iter(batches)
    for batch in it:
        yield batch
        if after():
            break
    else:
        return
    ready: queue.Queue = queue.Queue(maxsize=depth)
    quit_ = threading.Event()

    def offer(item) -> bool:
        while not quit_.is_set():
            try:
                ready.put(item, timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def work() -> None:
        try:
            for batch in it:
                if not offer((True, batch)):
                    return
            offer((False, None))
        except BaseException as exc:  # handed to the caller's thread, raised there
            offer((False, exc))

    thread = threading.Thread(target=work, name="read-ahead", daemon=True)
    thread.start()
    try:
        while True:
            more, item = ready.get()
            if not more:
                if item is not None:
                    raise item
                return
            yield item
    finally:
        quit_.set()
        thread.join()
        close = getattr(it, "close", None)
        if close is not None:
            close()
