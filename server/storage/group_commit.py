"""Group commit: requests that arrive while a transaction is being written share the next one.

No thread of its own: the first caller that finds no batch in flight becomes the leader, takes every item
queued so far (up to ``max_batch``, its own included), runs ``run_batch`` on them in one transaction and
hands each waiting caller its own outcome. Callers that arrived meanwhile wait; when the leader is done one
of them leads the next batch. Every caller returns only after the transaction holding its item committed
(or with the exception that concerns its item), so "committed before the 201" holds for each request,
and a lone request pays no wait at all.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Sequence


class _Slot:
    __slots__ = ("item", "done", "value", "error")

    def __init__(self, item):
        self.item = item
        self.done = False
        self.value = None
        self.error: BaseException | None = None


class GroupCommit:
    """``submit(item)`` blocks until ``run_batch([... item ...])`` has returned its outcome.

    ``run_batch(items) -> list`` returns one outcome per item, in order; an outcome that is an exception
    is raised in that item's caller. If ``run_batch`` itself raises, every caller of the batch gets it."""

    def __init__(self, run_batch: Callable[[Sequence], list], max_batch: int = 32):
        self._run = run_batch
        self.max_batch = max(1, int(max_batch))
        self._cond = threading.Condition()
        self._pending: list[_Slot] = []
        self._leading = False
        self.batches = 0  # counters for tests and benchmarks
        self.items = 0

    def submit(self, item):
        slot = _Slot(item)
        with self._cond:
            self._pending.append(slot)
            while True:
                while self._leading and not slot.done:
                    self._cond.wait()
                if slot.done:
                    break
                batch = self._pending[:self.max_batch]
                del self._pending[:self.max_batch]
                self._leading = True
                self._cond.release()
                try:
                    self._lead(batch)
                finally:
                    self._cond.acquire()
                    self._leading = False
                    self._cond.notify_all()
        if slot.error is not None:
            raise slot.error
        return slot.value

    def _lead(self, batch: list[_Slot]) -> None:
        try:
            outcomes = self._run([s.item for s in batch])
            if len(outcomes) != len(batch):
                raise RuntimeError(f"group commit: {len(outcomes)} outcomes for {len(batch)} items")
        except BaseException as exc:  # noqa: BLE001 - handed to every caller of the batch
            outcomes = [exc] * len(batch)
        with self._cond:
            self.batches += 1
            self.items += len(batch)
            for s, out in zip(batch, outcomes, strict=True):
                if isinstance(out, BaseException):
                    s.error = out
                else:
                    s.value = out
                s.done = True
