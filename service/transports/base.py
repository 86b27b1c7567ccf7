"""The seam between the service and where records come from and go to.

A transport receives input records, publishes output records (awaiting the
acknowledgement), and commits input positions once their effects are durable.
Kafka is the production transport; files and memory serve the demo, offline
replays and tests. Only ``kafka.py`` imports aiokafka.
"""

from __future__ import annotations

from collections.abc import AsyncIterator, Awaitable, Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Literal

__all__ = ["Record", "OutRecord", "Transport", "OutputKind", "AssignmentHook", "RevocationHook"]

OutputKind = Literal["estimates", "alerts", "dead_letters"]


@dataclass(frozen=True)
class Record:
    """One input record and where it came from."""

    value: bytes
    key: bytes | None = None
    headers: tuple[tuple[str, bytes], ...] = ()
    topic: str = "input"
    partition: int = 0
    offset: int = 0


@dataclass(frozen=True)
class OutRecord:
    kind: OutputKind
    key: bytes | None
    value: bytes
    headers: tuple[tuple[str, bytes], ...] = field(default=())


# Called with the newly assigned (topic, partition) pairs; returns where to
# start reading each one (offset of the next record), or omits it to use the
# transport's default (committed offset, else the beginning).
AssignmentHook = Callable[[Sequence[tuple[str, int]]], Awaitable[Mapping[tuple[str, int], int]]]
RevocationHook = Callable[[], Awaitable[None]]


class Transport:
    """Base class: receive / publish / commit, usable with ``async with``."""

    async def start(
        self, on_assign: AssignmentHook | None = None, on_revoke: RevocationHook | None = None
    ) -> None:
        """Connect. ``on_assign`` is awaited whenever partitions are assigned;
        ``on_revoke`` before partitions are taken away (to finish pending work)."""

    async def stop(self) -> None:
        """Flush and disconnect."""

    async def receive(self, timeout: float = 1.0) -> Record | None:
        """The next record, or None if none arrived within ``timeout`` seconds."""
        raise NotImplementedError

    @property
    def exhausted(self) -> bool:
        """True when a finite input has been read to its end (never for Kafka)."""
        return False

    async def publish(self, records: Sequence[OutRecord]) -> None:
        """Send records and wait until every one is acknowledged."""
        raise NotImplementedError

    async def commit(self, record: Record) -> None:
        """Mark ``record`` (and everything before it in its partition) as done."""
        raise NotImplementedError

    def is_current(self, record: Record) -> bool:
        """Whether ``record`` may still be processed (False after a rebalance moved on)."""
        return True

    async def check_connection(self) -> str | None:
        """None while the transport can reach what it reads from and writes to,
        else a short reason (the service's readiness reports it)."""
        return None

    def lag(self) -> dict[tuple[str, int], int]:
        """Records waiting per (topic, partition), where the transport knows it."""
        return {}

    def earlier(self, topic: str, partition: int, before: int, start: int = 0) -> AsyncIterator[Record]:
        """The input records of a partition with offsets from ``start`` up to (not
        including) ``before``, oldest first, as far back as the source still holds them. Raises
        NotImplementedError where the source cannot be read again (stdin)."""
        raise NotImplementedError(f"{type(self).__name__} cannot read its input again")

    async def input_ends(self) -> dict[tuple[str, int], int]:
        """For every input partition, the offset the next new record will get
        (without starting the transport). Raises NotImplementedError where unknown."""
        raise NotImplementedError(f"{type(self).__name__} cannot tell where its input ends")

    async def __aenter__(self) -> "Transport":
        await self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.stop()
