"""Requests batched together: texts that arrive within max_wait of the oldest waiting one run as one model call of
up to max_batch texts, padded to that batch's longest (shrinkwrap.serve.artifact.Artifact.predict). A request is
never split; its texts are answered together. Texts waiting beyond max_queue are refused at once (the caller
answers 503), so a burst cannot grow memory or latency without bound.

One model call at a time per worker process, in one thread beside the event loop: ONNX Runtime uses the intra-op
threads given to the session, and a second call at once would only compete with the first for the same cores.
Every accepted request is answered: `drain` waits until the queue is empty.
"""
from __future__ import annotations

import asyncio
import time
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Callable, Optional


@dataclass
class Waiting:
    texts: list[str]
    pairs: Optional[list[str]]
    answer: asyncio.Future
    arrived: float = field(default_factory=time.perf_counter)


class Batcher:
    def __init__(self, predict: Callable[[list[str], Optional[list[str]]], list[dict]], max_batch: int,
                 max_wait_s: float, max_queue: int, on_batch: Callable[[int, list[dict]], None] = lambda n, rows: None,
                 on_queue: Callable[[int], None] = lambda n: None):
        self.predict, self.max_batch, self.max_wait_s, self.max_queue = predict, max_batch, max_wait_s, max_queue
        self.on_batch, self.on_queue = on_batch, on_queue
        self.waiting: deque[Waiting] = deque()
        self.queued = 0                      # texts waiting, not yet in a model call
        self.arrival = asyncio.Event()
        self.idle = asyncio.Event()
        self.idle.set()
        self.pool = ThreadPoolExecutor(1, thread_name_prefix="model")
        self.task: Optional[asyncio.Task] = None

    def start(self) -> None:
        self.task = asyncio.get_running_loop().create_task(self._loop())

    def submit(self, texts: list[str], pairs: Optional[list[str]]) -> Optional[asyncio.Future]:
        """The future of the rows of `texts`; None when the queue is full (the caller refuses the request)."""
        if self.queued + len(texts) > self.max_queue:
            return None
        item = Waiting(texts, pairs, asyncio.get_running_loop().create_future())
        self.waiting.append(item)
        self.queued += len(texts)
        self.on_queue(self.queued)
        self.idle.clear()
        self.arrival.set()
        return item.answer

    async def drain(self) -> None:
        """Returns once every accepted request is answered; then stops the loop."""
        await self.idle.wait()
        if self.task is not None:
            self.task.cancel()
        self.pool.shutdown(wait=True)

    async def _loop(self) -> None:
        loop = asyncio.get_running_loop()
        while True:
            if not self.waiting:
                self.idle.set()
                self.arrival.clear()
                await self.arrival.wait()
                continue
            # Wait for companions until the batch is full or the oldest text has waited max_wait.
            deadline = self.waiting[0].arrived + self.max_wait_s
            while self.queued < self.max_batch and time.perf_counter() < deadline:
                self.arrival.clear()
                try:
                    await asyncio.wait_for(self.arrival.wait(), deadline - time.perf_counter())
                except asyncio.TimeoutError:   # the builtin TimeoutError from Python 3.11
                    break
            batch = [self.waiting.popleft()]
            size = len(batch[0].texts)
            while self.waiting and size + len(self.waiting[0].texts) <= self.max_batch:
                size += len(self.waiting[0].texts)
                batch.append(self.waiting.popleft())
            self.queued -= size
            self.on_queue(self.queued)
            texts = [t for item in batch for t in item.texts]
            pairs = None if batch[0].pairs is None else [p for item in batch for p in item.pairs]
            try:
                rows = await loop.run_in_executor(self.pool, self.predict, texts, pairs)
            except Exception as e:  # a bug: every request of the batch is told, none is left waiting
                for item in batch:
                    if not item.answer.done():
                        item.answer.set_exception(e)
                continue
            self.on_batch(size, rows)
            start = 0
            for item in batch:
                if not item.answer.done():   # a caller that went away leaves a cancelled future
                    item.answer.set_result(rows[start:start + len(item.texts)])
                start += len(item.texts)
