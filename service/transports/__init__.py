"""Transports: where observation records come from and where results go."""

from .base import AssignmentHook, OutputKind, OutRecord, Record, Transport
from .files import FileTransport
from .memory import MemoryTransport

__all__ = ["AssignmentHook", "FileTransport", "MemoryTransport", "OutRecord", "OutputKind", "Record", "Transport"]
