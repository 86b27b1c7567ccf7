"""Errors raised by the service.

::

    ServiceError
     +-- ConfigError            deployment config or model spec unusable at start-up
     +-- TransportError         a transport could not receive, publish or commit
     |    +-- TransportAuthError    the broker refused our credentials
     |    +-- TransportUnavailable  the broker is away or not ready now (the service retries)
     +-- StreamStateError       a stream's saved state cannot be used (see service.state)

Each carries the context it knows (stream, topic, partition, offset).
Bad *input records* are not exceptions at this level: they become dead letters.
"""

from __future__ import annotations

__all__ = ["ServiceError", "ConfigError", "TransportError", "TransportAuthError", "TransportUnavailable", "StreamStateError"]


class ServiceError(Exception):
    def __init__(
        self,
        message: str,
        *,
        stream: str | None = None,
        topic: str | None = None,
        partition: int | None = None,
        offset: int | None = None,
    ) -> None:
        context = [f"{k}={v}" for k, v in (("stream", stream), ("topic", topic), ("partition", partition), ("offset", offset)) if v is not None]
        super().__init__(message + (f" [{', '.join(context)}]" if context else ""))
        self.stream, self.topic, self.partition, self.offset = stream, topic, partition, offset


class ConfigError(ServiceError):
    pass


class TransportError(ServiceError):
    pass


class TransportAuthError(TransportError):
    pass


class TransportUnavailable(TransportError):
    """The broker cannot be reached or is not ready (connection refused, timed out,
    no partition leader): the same operation may succeed later, so the running
    service waits and retries instead of ending."""


class StreamStateError(ServiceError):
    pass
