"""A readers-writer lock: many searches at once, or one index update.

hnswlib is not safe for a search while an add runs, and a search must see
the store and the vector index at the same committed state: searches hold
the read side for the whole answer, updates hold the write side while they
commit and apply their change. Writers are preferred, so a stream of queries
cannot starve an update.
"""

from __future__ import annotations

import threading
from collections.abc import Iterator
from contextlib import contextmanager


class ReadWriteLock:
    """Shared reads, exclusive writes, writer preference; reentrant for the writer."""

    def __init__(self) -> None:
        self._cond = threading.Condition(threading.Lock())
        self._readers = 0
        self._writer: int | None = None
        self._writer_depth = 0
        self._waiting_writers = 0

    @contextmanager
    def read(self) -> Iterator[None]:
        """Hold the lock for reading."""
        me = threading.get_ident()
        with self._cond:
            if self._writer == me:  # a writer may read what it is writing
                self._readers += 1
            else:
                while self._writer is not None or self._waiting_writers:
                    self._cond.wait()
                self._readers += 1
        try:
            yield
        finally:
            with self._cond:
                self._readers -= 1
                if self._readers == 0:
                    self._cond.notify_all()

    @contextmanager
    def write(self) -> Iterator[None]:
        """Hold the lock for writing."""
        me = threading.get_ident()
        with self._cond:
            if self._writer == me:
                self._writer_depth += 1
            else:
                self._waiting_writers += 1
                while self._writer is not None or self._readers:
                    self._cond.wait()
                self._waiting_writers -= 1
                self._writer = me
                self._writer_depth = 1
        try:
            yield
        finally:
            with self._cond:
                self._writer_depth -= 1
                if self._writer_depth == 0:
                    self._writer = None
                    self._cond.notify_all()
