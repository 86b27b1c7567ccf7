"""Newline-delimited JSON files (or stdin/stdout): the embedded default.

Input: one observation per line; a record's offset is its 0-based line number and
its topic the input file's name (so saved positions do not depend on the
directory the service runs from).
Output: ``estimates.ndjson``, ``alerts.ndjson`` and ``dead_letters.ndjson``
in an output directory (one JSON value per line, flushed and fsynced before
``publish`` returns), or all to stdout. Commits go to ``committed.json`` in the
output directory so an interrupted replay resumes where it stopped.
"""

from __future__ import annotations

import asyncio
import os
import sys
from collections.abc import AsyncIterator, Sequence
from pathlib import Path
from typing import BinaryIO

import orjson

from ..errors import TransportError
from .base import AssignmentHook, RevocationHook, OutRecord, Record, Transport

__all__ = ["FileTransport", "OUTPUT_FILES"]

OUTPUT_FILES = {"estimates": "estimates.ndjson", "alerts": "alerts.ndjson", "dead_letters": "dead_letters.ndjson"}


class FileTransport(Transport):
    def __init__(self, input_path: Path | None, output_dir: Path | None, topic: str | None = None) -> None:
        self.input_path = input_path
        self.output_dir = output_dir
        # The file's name, not its path: positions then survive running from another
        # directory or moving the deployment's folder.
        self.topic = topic or (Path(input_path).name if input_path else "stdin")
        self._in: BinaryIO | None = None
        self._out: dict[str, BinaryIO] = {}
        self._next_offset = 0
        self._eof = False

    @property
    def _commit_path(self) -> Path | None:
        return self.output_dir / "committed.json" if self.output_dir else None

    def _committed(self) -> int | None:
        path = self._commit_path
        if path is None or not path.exists():
            return None
        try:
            data = orjson.loads(path.read_bytes())
            return int(data[self.topic]) if self.topic in data else None
        except (orjson.JSONDecodeError, ValueError, TypeError) as exc:
            raise TransportError(f"commit file {path} is unreadable: {exc}") from None

    async def start(self, on_assign: AssignmentHook | None = None, on_revoke: RevocationHook | None = None) -> None:
        try:
            self._in = open(self.input_path, "rb") if self.input_path else sys.stdin.buffer
        except OSError as exc:
            raise TransportError(f"cannot open input {self.input_path}: {exc.strerror}", topic=self.topic) from None
        if self.output_dir is not None:
            self.output_dir.mkdir(parents=True, exist_ok=True)
            for kind, name in OUTPUT_FILES.items():
                self._out[kind] = open(self.output_dir / name, "ab")
        start = None
        if on_assign is not None:
            start = (await on_assign([(self.topic, 0)])).get((self.topic, 0))
        if start is None:
            start = self._committed() or 0
        while self._next_offset < start and not self._eof:
            if not self._in.readline():
                self._eof = True
            else:
                self._next_offset += 1

    async def stop(self) -> None:
        for f in self._out.values():
            f.close()
        self._out.clear()
        if self._in is not None and self._in is not sys.stdin.buffer:
            self._in.close()
        self._in = None

    async def receive(self, timeout: float = 1.0) -> Record | None:
        if self._eof or self._in is None:
            # Nothing will come: wait out the timeout like a quiet broker would, so
            # a polling loop yields to other tasks (signals, /metrics) instead of spinning.
            await asyncio.sleep(timeout)
            return None
        if self._in is sys.stdin.buffer:
            line = await asyncio.get_running_loop().run_in_executor(None, self._in.readline)
        else:
            line = self._in.readline()
        if not line:
            self._eof = True
            return None
        record = Record(value=line.rstrip(b"\r\n"), topic=self.topic, partition=0, offset=self._next_offset)
        self._next_offset += 1
        return record

    @property
    def exhausted(self) -> bool:
        return self._eof

    async def input_ends(self) -> dict[tuple[str, int], int]:
        if self.input_path is None:
            raise NotImplementedError("standard input has no end to look up")
        try:
            with open(self.input_path, "rb") as f:
                return {(self.topic, 0): sum(1 for _ in f)}
        except OSError as exc:
            raise TransportError(f"cannot read input {self.input_path}: {exc.strerror}", topic=self.topic) from None

    async def earlier(self, topic: str, partition: int, before: int, start: int = 0) -> AsyncIterator[Record]:
        if self.input_path is None:
            raise NotImplementedError("standard input cannot be read again")
        if (topic, partition) != (self.topic, 0):
            return
        try:
            with open(self.input_path, "rb") as f:
                for offset, line in enumerate(f):
                    if offset >= before:
                        break
                    if offset < start:
                        continue
                    yield Record(value=line.rstrip(b"\r\n"), topic=self.topic, partition=0, offset=offset)
        except OSError as exc:
            raise TransportError(f"cannot read input {self.input_path} again: {exc.strerror}", topic=self.topic) from None

    async def publish(self, records: Sequence[OutRecord]) -> None:
        touched = set()
        for r in records:
            if self.output_dir is None:
                sys.stdout.buffer.write(r.value + b"\n")
                continue
            f = self._out[r.kind]
            f.write(r.value + b"\n")
            touched.add(r.kind)
        if self.output_dir is None:
            sys.stdout.buffer.flush()
        for kind in touched:
            self._out[kind].flush()
            os.fsync(self._out[kind].fileno())

    async def commit(self, record: Record) -> None:
        path = self._commit_path
        if path is None:
            return
        data = {}
        if path.exists():
            data = orjson.loads(path.read_bytes())
        data[self.topic] = record.offset + 1
        tmp = path.with_suffix(".tmp")
        tmp.write_bytes(orjson.dumps(data))
        os.replace(tmp, path)
