"""A private asyncio event loop in a daemon thread, so the synchronous store can drive aiokafka.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import logging
import threading
from collections.abc import Coroutine
from typing import Any, TypeVar

from .index import _Engine

log = logging.getLogger("casecloud.checkpoints.kafka")

T = TypeVar("T")

class _CallTimeout(Exception):
    """A call to the store's event loop did not finish in time."""


class _LoopThread:
    """A private asyncio event loop in a daemon thread; started on demand."""

    def __init__(self, name: str) -> None:
        self.name = name
        self._guard = threading.Lock()
        self.loop: asyncio.AbstractEventLoop | None = None
        self.thread: threading.Thread | None = None

    def _ensure(self) -> asyncio.AbstractEventLoop:
        with self._guard:
            if self.loop is None:
                loop = asyncio.new_event_loop()
                ready = threading.Event()

                def run() -> None:
                    asyncio.set_event_loop(loop)
                    loop.call_soon(ready.set)
                    loop.run_forever()

                thread = threading.Thread(target=run, name=self.name, daemon=True)
                thread.start()
                ready.wait()
                self.loop, self.thread = loop, thread
            return self.loop

    def call(self, coro: Coroutine[Any, Any, T], timeout: float) -> T:
        loop = self._ensure()
        if threading.current_thread() is self.thread:
            coro.close()
            raise RuntimeError("KafkaCheckpointStore must not be called from its own event loop thread")
        future = asyncio.run_coroutine_threadsafe(coro, loop)
        try:
            return future.result(timeout)
        except concurrent.futures.TimeoutError:
            if future.done():
                raise  # the coroutine itself raised TimeoutError
            future.cancel()
            raise _CallTimeout() from None

    def shutdown(self, final: Coroutine[Any, Any, Any] | None, timeout: float) -> None:
        with self._guard:
            loop, thread = self.loop, self.thread
            self.loop = self.thread = None
        if loop is None or thread is None:
            if final is not None:
                final.close()
            return
        try:
            if final is not None and thread.is_alive():
                try:
                    asyncio.run_coroutine_threadsafe(final, loop).result(timeout)
                except Exception as exc:  # best effort
                    log.warning("closing the Kafka checkpoint store: %s", exc)
        finally:
            if thread.is_alive():
                loop.call_soon_threadsafe(loop.stop)
                thread.join(timeout)
            if not thread.is_alive():
                loop.close()


def _shutdown(runner: _LoopThread, engine: _Engine, timeout: float) -> None:
    async def final() -> None:
        async with engine.lock:
            await engine.stop()

    runner.shutdown(final(), timeout)
    engine._lock = None  # an asyncio.Lock belongs to one loop; the next one gets a new lock


