"""Apache Kafka via aiokafka: a consumer group with manual commits and an
``acks=all`` producer. The only module that imports aiokafka.

Rebalances: when partitions are assigned, the service's assignment hook says
where to resume each one (from its checkpoints), and the consumer seeks there.
When partitions are revoked, the message in flight is finished first: the
service holds :attr:`KafkaTransport.processing` while it steps, publishes and
checkpoints, and revocation waits for it.

Broker outages: errors that may pass (connection refused or lost, timeouts, no
partition leader, an unknown topic) become :class:`TransportUnavailable`, which
the running service answers by waiting and retrying (``service.runtime.app``);
:meth:`KafkaTransport.check_connection` tells it whether the cluster answers.
aiokafka logs the same error many times a second while a broker is away; its
loggers get a filter that lets each distinct message through once a minute
with a count of the repeats, and logs the normal wait for a topic or the group
coordinator at start-up as INFO, not ERROR.
"""

from __future__ import annotations

import asyncio
import logging
import ssl
import time
from collections.abc import AsyncIterator, Sequence
from typing import Any

from aiokafka import AIOKafkaConsumer, AIOKafkaProducer, ConsumerRebalanceListener, TopicPartition
from aiokafka import errors as kafka_errors
from aiokafka.conn import create_conn

from schemas import KafkaSettings

from ..errors import ConfigError, TransportAuthError, TransportError, TransportUnavailable
from .base import AssignmentHook, RevocationHook, OutRecord, Record, Transport

__all__ = ["KafkaTransport", "client_security", "stop_quietly", "translate_error", "quiet_client_logs"]

log = logging.getLogger("casecloud.kafka")

# aiokafka's loggers (one per module; the client's is plain "aiokafka").
_CLIENT_LOGGERS = (
    "aiokafka",
    "aiokafka.admin.client",
    "aiokafka.cluster",
    "aiokafka.conn",
    "aiokafka.consumer.consumer",
    "aiokafka.consumer.fetcher",
    "aiokafka.consumer.group_coordinator",
    "aiokafka.producer.producer",
    "aiokafka.producer.sender",
)


def _start_up_wait(record: logging.LogRecord) -> bool:
    """The normal wait at start-up: a topic being created, or the group
    coordinator (its offsets topic) not ready yet."""
    template = str(record.msg)
    return template.startswith("Topic %s not found in cluster metadata") or (
        template.startswith("Group Coordinator Request failed") and "GroupCoordinatorNotAvailable" in record.getMessage()
    )


class _ClientLogFilter(logging.Filter):
    """Let each distinct aiokafka warning or error through once per ``window``
    seconds (the first one, then one with the count of those held back), and
    log the start-up waits (:func:`_start_up_wait`) as INFO."""

    def __init__(self, window: float = 60.0, clock=time.monotonic) -> None:
        super().__init__()
        self.window, self.clock = window, clock
        self._seen: dict[tuple[str, str], list[float]] = {}  # (logger, template) -> [shown at, held back]

    def filter(self, record: logging.LogRecord) -> bool:
        template = str(record.msg)
        if record.levelno >= logging.ERROR and _start_up_wait(record):
            record.levelno, record.levelname = logging.INFO, "INFO"
            # the logger let it through as an ERROR: apply its level again to the INFO record
            return logging.getLogger(record.name).isEnabledFor(logging.INFO)
        if record.levelno < logging.WARNING:
            return True
        key = (record.name, template)
        now = self.clock()
        entry = self._seen.get(key)
        if entry is not None and now - entry[0] < self.window:
            entry[1] += 1
            return False
        held = int(entry[1]) if entry is not None else 0
        self._seen[key] = [now, 0]
        if held:
            record.msg = f"{template} ({held} more like this in the last {now - entry[0]:.0f} s)"  # type: ignore[index]
        return True


_LOG_FILTER = _ClientLogFilter()


def quiet_client_logs() -> None:
    """Install the aiokafka log filter (idempotent)."""
    for name in _CLIENT_LOGGERS:
        logger = logging.getLogger(name)
        if _LOG_FILTER not in logger.filters:
            logger.addFilter(_LOG_FILTER)


# An idempotent producer whose batches expired (broker away longer than the request
# timeout) is refused for good: publish again with a new producer.
_SEQUENCE_ERRORS: tuple[type[BaseException], ...] = (
    kafka_errors.OutOfOrderSequenceNumber,
    kafka_errors.UnknownProducerId,
    kafka_errors.InvalidProducerEpoch,
)

_AUTH_ERRORS: tuple[type[BaseException], ...] = (
    kafka_errors.AuthenticationFailedError,
    kafka_errors.AuthenticationMethodNotSupported,
    kafka_errors.UnsupportedSaslMechanismError,
    kafka_errors.IllegalSaslStateError,
    kafka_errors.SaslAuthenticationFailed,
    kafka_errors.TopicAuthorizationFailedError,
    kafka_errors.GroupAuthorizationFailedError,
    kafka_errors.ClusterAuthorizationFailedError,
)


def translate_error(exc: BaseException, what: str, topic: str | None = None, *, tls: bool = False) -> TransportError:
    """Map an aiokafka exception to the most specific service error
    (``tls``: the connection uses TLS, so a closed connection may be a
    refused client certificate)."""
    if isinstance(exc, kafka_errors.IllegalSaslStateError):
        return TransportAuthError(
            f"Kafka refused our credentials while trying to {what}: {exc}; the broker did not accept a SASL "
            f"handshake there: is the bootstrap address a SASL listener?",
            topic=topic,
        )
    if isinstance(exc, _AUTH_ERRORS):
        return TransportAuthError(f"Kafka refused our credentials while trying to {what}: {exc}", topic=topic)
    if isinstance(exc, ssl.SSLError):
        return TransportError(
            f"TLS handshake failed while trying to {what}: {exc}; check kafka.ssl_cafile "
            f"(the CA that signed the broker's certificate, whose name must match the bootstrap address) "
            f"and, if the broker wants a client certificate, kafka.ssl_certfile / ssl_keyfile",
            topic=topic,
        )
    if tls and isinstance(exc, kafka_errors.KafkaConnectionError) and "closed" in str(exc):
        return TransportError(
            f"the Kafka broker closed the connection while trying to {what}: {exc}; a TLS listener "
            f"that requires a client certificate does this when kafka.ssl_certfile is missing or not trusted",
            topic=topic,
        )
    if isinstance(exc, kafka_errors.KafkaConnectionError):
        return TransportUnavailable(f"cannot reach the Kafka brokers to {what}: {exc}", topic=topic)
    if getattr(exc, "retriable", False) or isinstance(exc, (kafka_errors.KafkaTimeoutError, asyncio.TimeoutError)):
        return TransportUnavailable(
            f"Kafka is not available to {what}: {type(exc).__name__}: {exc}; this may pass (broker restarting, "
            f"leader election, a topic being created)",
            topic=topic,
        )
    return TransportError(f"Kafka error while trying to {what}: {type(exc).__name__}: {exc}", topic=topic)


async def stop_quietly(*clients: Any, what: str = "Kafka client") -> None:
    """Stop aiokafka clients (None skipped); a failure is logged, never raised,
    so that closing never masks the problem that led to it."""
    for client in clients:
        if client is not None:
            try:
                await client.stop()
            except asyncio.CancelledError:
                # aiokafka re-raises the cancellation of its own background task when a
                # consumer is stopped right after it started; only ours must propagate.
                task = asyncio.current_task()
                if task is not None and task.cancelling():
                    raise
                log.debug("a %s raised its internal cancellation while stopping", what)
            except Exception as exc:
                log.warning("error while stopping a %s: %s", what, exc)


def client_security(settings: KafkaSettings) -> dict[str, Any]:
    """aiokafka's security keyword arguments from our settings (the same for
    producer, consumer, a diagnostic connection and the Kafka checkpoint
    store). aiokafka takes SCRAM credentials through its ``sasl_plain_*``
    arguments too."""
    opts: dict[str, Any] = {"security_protocol": settings.security_protocol}
    if settings.security_protocol in ("SSL", "SASL_SSL"):
        opts["ssl_context"] = _ssl_context(settings)
    if settings.security_protocol.startswith("SASL"):
        opts["sasl_mechanism"] = settings.sasl_mechanism or "PLAIN"
        opts["sasl_plain_username"] = settings.sasl_username
        opts["sasl_plain_password"] = settings.sasl_password.get_secret_value() if settings.sasl_password else None
    return opts


def _ssl_context(s: KafkaSettings) -> ssl.SSLContext:
    """Verifying context (hostname checked): the system CAs or ``ssl_cafile``,
    plus the client certificate when ``ssl_certfile`` is set."""
    try:
        context = ssl.create_default_context(cafile=str(s.ssl_cafile) if s.ssl_cafile else None)
    except (OSError, ssl.SSLError) as exc:
        raise ConfigError(f"kafka.ssl_cafile {s.ssl_cafile}: cannot load CA certificates: {exc}") from None
    if s.ssl_certfile is not None:
        try:
            context.load_cert_chain(str(s.ssl_certfile), str(s.ssl_keyfile) if s.ssl_keyfile else None)
        except (OSError, ssl.SSLError) as exc:
            raise ConfigError(
                f"kafka.ssl_certfile {s.ssl_certfile} / ssl_keyfile {s.ssl_keyfile}: cannot load the client "
                f"certificate and key (PEM, unencrypted key): {exc}"
            ) from None
    return context


class _Rebalance(ConsumerRebalanceListener):
    def __init__(self, transport: "KafkaTransport") -> None:
        self.transport = transport

    async def on_partitions_revoked(self, revoked: Sequence[TopicPartition]) -> None:
        async with self.transport.processing:
            if self.transport.on_revoke is not None:
                await self.transport.on_revoke()
            log.info("partitions revoked: %s", sorted((tp.topic, tp.partition) for tp in revoked))

    async def on_partitions_assigned(self, assigned: Sequence[TopicPartition]) -> None:
        t = self.transport
        pairs = sorted((tp.topic, tp.partition) for tp in assigned)
        log.info("partitions assigned: %s", pairs)
        # Hold the processing lock so no record is handled while stream state
        # is reloaded, and drop records fetched under the old assignment: we
        # seek every partition to its resume point anyway.
        async with t.processing:
            t._buffer.clear()
            t.generation += 1
            if t.on_assign is None or not pairs:
                return
            seeks = await t.on_assign(pairs)
            assert t.consumer is not None
            for (topic, partition), offset in seeks.items():
                t.consumer.seek(TopicPartition(topic, partition), offset)


class KafkaTransport(Transport):
    def __init__(self, settings: KafkaSettings, max_message_bytes: int = 1_048_576) -> None:
        self.settings = settings
        self.max_message_bytes = max_message_bytes
        self.consumer: AIOKafkaConsumer | None = None
        self.producer: AIOKafkaProducer | None = None
        self._renew_producer = False  # a publish failed: the next one starts a new producer
        self.on_assign: AssignmentHook | None = None
        self.on_revoke: RevocationHook | None = None
        self.processing = asyncio.Lock()
        self._buffer: list[Record] = []
        self.generation = 0  # bumped at every assignment
        self._received_in = -1
        self._positions: dict[tuple[str, int], int] = {}
        self._topics = {
            "estimates": settings.estimates_topic,
            "alerts": settings.alerts_topic,
            "dead_letters": settings.dead_letter_topic,
        }

    def _security(self) -> dict:
        return client_security(self.settings)

    async def _diagnose(self, security: dict) -> BaseException | None:
        """aiokafka reports any bootstrap failure (refused credentials, TLS
        errors, unreachable hosts) as one "Unable to bootstrap" error; connect
        to each bootstrap server ourselves to find the real cause."""
        for address in self.settings.bootstrap_servers.split(","):
            host, _, port = address.strip().rpartition(":")
            if not port.isdigit():
                continue
            try:
                conn = await asyncio.wait_for(
                    create_conn(host, int(port), client_id=self.settings.client_id, **security), timeout=15
                )
            except asyncio.TimeoutError:
                continue
            except Exception as exc:  # the cause we are looking for
                return exc
            conn.close()
        return None

    async def start(self, on_assign: AssignmentHook | None = None, on_revoke: RevocationHook | None = None) -> None:
        s = self.settings
        quiet_client_logs()
        self.on_assign = on_assign
        self.on_revoke = on_revoke
        security = self._security()
        self.producer = self._make_producer()
        self.consumer = AIOKafkaConsumer(
            s.input_topic,
            bootstrap_servers=s.bootstrap_servers,
            client_id=s.client_id,
            group_id=s.group_id,
            enable_auto_commit=False,
            auto_offset_reset="earliest",
            max_partition_fetch_bytes=max(self.max_message_bytes * 2, 1_048_576),
            session_timeout_ms=s.session_timeout_ms,
            heartbeat_interval_ms=min(1_000, s.session_timeout_ms // 3),
            **security,
        )
        try:
            await self.producer.start()
            self.consumer.subscribe([s.input_topic], listener=_Rebalance(self))
            await self.consumer.start()
        except Exception as exc:
            await self.stop()
            cause: BaseException = exc
            if isinstance(exc, kafka_errors.KafkaConnectionError):
                cause = await self._diagnose(security) or exc
            what = f"connect to {s.bootstrap_servers}"
            if s.security_protocol.startswith("SASL"):
                what += f" as user {s.sasl_username!r} with SASL {security['sasl_mechanism']}"
            if s.security_protocol != "PLAINTEXT":
                what += f" over {s.security_protocol}"
            raise translate_error(cause, what, s.input_topic, tls="SSL" in s.security_protocol) from exc

    def _make_producer(self) -> AIOKafkaProducer:
        s = self.settings
        return AIOKafkaProducer(
            bootstrap_servers=s.bootstrap_servers,
            client_id=s.client_id,
            acks="all",
            enable_idempotence=True,
            request_timeout_ms=s.publish_timeout_ms,
            max_request_size=max(self.max_message_bytes * 4, 1_048_576),
            **self._security(),
        )

    async def _replace_producer(self) -> None:
        """A new producer (a new producer id) after a failed publish. Batches that expired
        while the broker was away leave a gap in an idempotent producer's sequence numbers,
        which the broker answers with OutOfOrderSequenceNumber for good."""
        old, self.producer = self.producer, None
        await stop_quietly(old, what="producer of a failed publish")
        producer = self._make_producer()
        try:
            await producer.start()
        except Exception as exc:
            await stop_quietly(producer, what="new producer")
            raise translate_error(exc, f"reconnect the producer to {self.settings.bootstrap_servers}") from exc
        self.producer = producer
        self._renew_producer = False
        log.info("publishing with a new producer after a failed publish")

    async def stop(self) -> None:
        await stop_quietly(self.consumer, self.producer)
        self.consumer = self.producer = None

    async def receive(self, timeout: float = 1.0) -> Record | None:
        assert self.consumer is not None, "transport not started"
        if not self._buffer:
            try:
                batches = await self.consumer.getmany(timeout_ms=int(timeout * 1000), max_records=100)
            except Exception as exc:
                raise translate_error(exc, "fetch records", self.settings.input_topic) from exc
            for tp, messages in sorted(batches.items(), key=lambda kv: (kv[0].topic, kv[0].partition)):
                for m in messages:
                    self._buffer.append(
                        Record(
                            value=m.value or b"",
                            key=m.key,
                            headers=tuple((k, v or b"") for k, v in (m.headers or ())),
                            topic=m.topic,
                            partition=m.partition,
                            offset=m.offset,
                        )
                    )
        if not self._buffer:
            return None
        record = self._buffer.pop(0)
        assigned = {(tp.topic, tp.partition) for tp in self.consumer.assignment()}
        if (record.topic, record.partition) not in assigned:
            # Fetched before a rebalance moved the partition away: drop it,
            # the new owner reads it from its own resume point.
            self._buffer = [r for r in self._buffer if (r.topic, r.partition) in assigned]
            return None
        self._positions[(record.topic, record.partition)] = record.offset + 1
        self._received_in = self.generation
        return record

    async def check_connection(self, timeout: float = 5.0) -> str | None:
        """None when the cluster answers a metadata request (over the producer's
        connections), else why not."""
        if self.producer is None:
            return "no producer (being replaced after a failed publish)"
        try:
            await asyncio.wait_for(self.producer.client.fetch_all_metadata(), timeout)
        except asyncio.TimeoutError:
            return f"no metadata answer from {self.settings.bootstrap_servers} within {timeout:g} s"
        except Exception as exc:  # the reason is what we report
            return f"{type(exc).__name__}: {exc}"
        return None

    def is_current(self, record: Record) -> bool:
        """False if a rebalance happened since ``record`` was received: it will
        be read again from the partition's resume point (by us or its new owner)."""
        return self._received_in == self.generation

    async def publish(self, records: Sequence[OutRecord]) -> None:
        assert self.consumer is not None, "transport not started"
        if self._renew_producer or self.producer is None:
            await self._replace_producer()
        assert self.producer is not None
        try:
            futures = [
                await self.producer.send(self._topics[r.kind], value=r.value, key=r.key, headers=list(r.headers))
                for r in records
            ]
            await asyncio.gather(*futures)
        except Exception as exc:
            error = translate_error(exc, "publish results", None)
            if isinstance(exc, _SEQUENCE_ERRORS):
                error = TransportUnavailable(
                    f"the broker refused the producer's sequence after an outage ({type(exc).__name__}); "
                    "publishing again with a new producer"
                )
            if isinstance(error, TransportUnavailable):
                self._renew_producer = True
            raise error from exc

    async def commit(self, record: Record) -> None:
        assert self.consumer is not None, "transport not started"
        tp = TopicPartition(record.topic, record.partition)
        try:
            await self.consumer.commit({tp: record.offset + 1})
        except (kafka_errors.CommitFailedError, kafka_errors.IllegalStateError, kafka_errors.RebalanceInProgressError) as exc:
            # The partition moved on; the checkpoint (not this commit) is the
            # source of truth, so the new owner resumes correctly.
            log.warning("commit of %s:%s@%s skipped: %s", record.topic, record.partition, record.offset, exc)
        except Exception as exc:
            raise translate_error(exc, "commit offsets", record.topic) from exc

    def lag(self) -> dict[tuple[str, int], int]:
        if self.consumer is None:
            return {}
        out = {}
        for tp in self.consumer.assignment():
            high = self.consumer.highwater(tp)
            if high is not None:
                out[(tp.topic, tp.partition)] = max(0, high - self._positions.get((tp.topic, tp.partition), high))
        return out

    async def input_ends(self) -> dict[tuple[str, int], int]:
        """End offsets of every partition of the input topic (an admin client for the
        partition list, a consumer of no group for the offsets)."""
        from aiokafka.admin import AIOKafkaAdminClient

        s = self.settings
        admin = AIOKafkaAdminClient(bootstrap_servers=s.bootstrap_servers, client_id=f"{s.client_id}-ends", **self._security())
        reader = AIOKafkaConsumer(bootstrap_servers=s.bootstrap_servers, client_id=f"{s.client_id}-ends", group_id=None, **self._security())
        try:
            await admin.start()
            described = [d for d in await admin.describe_topics([s.input_topic]) if d["topic"] == s.input_topic]
            if not described or described[0]["error_code"] != 0:
                raise TransportError(f"input topic {s.input_topic!r} is not in the cluster: {described}", topic=s.input_topic)
            tps = [TopicPartition(s.input_topic, d["partition"]) for d in described[0]["partitions"]]
            await reader.start()
            ends = await reader.end_offsets(tps) if tps else {}
            return {(tp.topic, tp.partition): int(offset) for tp, offset in sorted(ends.items())}
        except TransportError:
            raise
        except Exception as exc:
            raise translate_error(exc, f"look up the end of {s.input_topic}", s.input_topic) from exc
        finally:
            await stop_quietly(reader, what="end-offset reader")
            await admin.close()

    async def earlier(self, topic: str, partition: int, before: int, start: int = 0) -> AsyncIterator[Record]:
        """Read the partition from ``start`` (or its earliest retained offset, if later) up to
        ``before`` with a consumer of its own (no group, nothing committed)."""
        s = self.settings
        tp = TopicPartition(topic, partition)
        reader = AIOKafkaConsumer(
            bootstrap_servers=s.bootstrap_servers,
            client_id=f"{s.client_id}-history",
            group_id=None,
            enable_auto_commit=False,
            max_partition_fetch_bytes=max(self.max_message_bytes * 2, 1_048_576),
            **self._security(),
        )
        try:
            await reader.start()
            reader.assign([tp])
            first = (await reader.beginning_offsets([tp]))[tp]
            reader.seek(tp, max(first, start))
            end = min(before, (await reader.end_offsets([tp]))[tp])
            while await reader.position(tp) < end:
                batch = await reader.getmany(tp, timeout_ms=1000, max_records=500)
                for m in batch.get(tp, []):
                    if m.offset >= end:
                        return
                    yield Record(
                        value=m.value or b"",
                        key=m.key,
                        headers=tuple((k, v or b"") for k, v in (m.headers or ())),
                        topic=m.topic,
                        partition=m.partition,
                        offset=m.offset,
                    )
        except TransportError:
            raise
        except Exception as exc:
            raise translate_error(exc, f"read {topic}[{partition}] from its beginning", topic) from exc
        finally:
            await stop_quietly(reader, what="history reader")

