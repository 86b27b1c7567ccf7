"""An in-memory transport for tests: a list in, lists out."""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator, Sequence

from .base import AssignmentHook, RevocationHook, OutRecord, Record, Transport

__all__ = ["MemoryTransport"]


class MemoryTransport(Transport):
    """Records in ``inputs`` are delivered in order (honouring seeks from the
    assignment hook); published records collect in ``published`` by kind."""

    def __init__(self, inputs: Sequence[bytes | Record] = (), topic: str = "input") -> None:
        self.topic = topic
        self.inputs: list[Record] = [
            r if isinstance(r, Record) else Record(value=r, topic=topic, partition=0, offset=i)
            for i, r in enumerate(inputs)
        ]
        self.position = 0
        self._idle = False
        self.committed: int | None = None
        self.published: dict[str, list[OutRecord]] = {"estimates": [], "alerts": [], "dead_letters": []}

    async def start(self, on_assign: AssignmentHook | None = None, on_revoke: RevocationHook | None = None) -> None:
        if on_assign is not None:
            seek = await on_assign([(self.topic, 0)])
            start = seek.get((self.topic, 0))
            if start is None:
                start = self.committed or 0
            self.position = start

    def feed(self, value: bytes) -> Record:
        record = Record(value=value, topic=self.topic, partition=0, offset=len(self.inputs))
        self.inputs.append(record)
        return record

    async def receive(self, timeout: float = 1.0) -> Record | None:
        if self.position >= len(self.inputs):
            if not self._idle:
                self._idle = True  # the call that reaches the end answers at once
                return None
            # Later calls wait up to ``timeout`` for a fed record, so a polling loop
            # yields to other tasks instead of spinning.
            loop = asyncio.get_running_loop()
            deadline = loop.time() + timeout
            while self.position >= len(self.inputs) and loop.time() < deadline:
                await asyncio.sleep(min(0.01, timeout))
            if self.position >= len(self.inputs):
                return None
        self._idle = False
        record = self.inputs[self.position]
        self.position += 1
        return record

    @property
    def exhausted(self) -> bool:
        return self.position >= len(self.inputs)

    async def publish(self, records: Sequence[OutRecord]) -> None:
        for r in records:
            self.published[r.kind].append(r)

    async def commit(self, record: Record) -> None:
        self.committed = record.offset + 1

    def lag(self) -> dict[tuple[str, int], int]:
        return {(self.topic, 0): len(self.inputs) - self.position}

    async def earlier(self, topic: str, partition: int, before: int, start: int = 0) -> AsyncIterator[Record]:
        for record in list(self.inputs):
            if (record.topic, record.partition) == (topic, partition) and start <= record.offset < before:
                yield record

    async def input_ends(self) -> dict[tuple[str, int], int]:
        return {(self.topic, 0): len(self.inputs)}
