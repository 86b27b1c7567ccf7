"""Apache Kafka via aiokafka: a consumer group with manual commits and an
``acks=all`` producer. The only module that imports aiokafka.

Rebalances: when partitions are assigned, the service's assignment hook says
where to resume each one (from its checkpoints), and the consumer seeks there.
When partitions are revoked, the message in flight is finished first: the
service holds :attr:`KafkaTransport.processing` while it steps, publishes and
checkpoints, and revocation waits for it.
"""

from __future__ import annotations

import asyncio
import logging
import ssl
from collections.abc import Sequence

from aiokafka import AIOKafkaConsumer, AIOKafkaProducer, ConsumerRebalanceListener, TopicPartition
from aiokafka import errors as kafka_errors

from schemas import KafkaSettings

from ..errors import TransportAuthError, TransportError
from .base import AssignmentHook, RevocationHook, OutRecord, Record, Transport

__all__ = ["KafkaTransport", "translate_error"]

log = logging.getLogger("casecloud.kafka")

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


def translate_error(exc: BaseException, what: str, topic: str | None = None) -> TransportError:
    """Map an aiokafka exception to the most specific service error."""
    if isinstance(exc, _AUTH_ERRORS):
        return TransportAuthError(f"Kafka refused our credentials while trying to {what}: {exc}", topic=topic)
    if isinstance(exc, kafka_errors.KafkaConnectionError):
        return TransportError(f"cannot reach the Kafka brokers to {what}: {exc}", topic=topic)
    return TransportError(f"Kafka error while trying to {what}: {type(exc).__name__}: {exc}", topic=topic)


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
        s = self.settings
        opts: dict = {"security_protocol": s.security_protocol}
        if s.security_protocol in ("SSL", "SASL_SSL"):
            opts["ssl_context"] = ssl.create_default_context(cafile=str(s.ssl_cafile) if s.ssl_cafile else None)
        if s.security_protocol.startswith("SASL"):
            opts["sasl_mechanism"] = s.sasl_mechanism or "PLAIN"
            opts["sasl_plain_username"] = s.sasl_username
            opts["sasl_plain_password"] = s.sasl_password.get_secret_value() if s.sasl_password else None
        return opts

    async def start(self, on_assign: AssignmentHook | None = None, on_revoke: RevocationHook | None = None) -> None:
        s = self.settings
        self.on_assign = on_assign
        self.on_revoke = on_revoke
        security = self._security()
        self.producer = AIOKafkaProducer(
            bootstrap_servers=s.bootstrap_servers,
            client_id=s.client_id,
            acks="all",
            enable_idempotence=True,
            max_request_size=max(self.max_message_bytes * 4, 1_048_576),
            **security,
        )
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
            raise translate_error(exc, f"connect to {s.bootstrap_servers}", s.input_topic) from exc

    async def stop(self) -> None:
        for client in (self.consumer, self.producer):
            if client is not None:
                try:
                    await client.stop()
                except Exception as exc:  # stopping must not mask the original problem
                    log.warning("error while stopping Kafka client: %s", exc)
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

    def is_current(self, record: Record) -> bool:
        """False if a rebalance happened since ``record`` was received: it will
        be read again from the partition's resume point (by us or its new owner)."""
        return self._received_in == self.generation

    async def publish(self, records: Sequence[OutRecord]) -> None:
        assert self.producer is not None, "transport not started"
        try:
            futures = [
                await self.producer.send(self._topics[r.kind], value=r.value, key=r.key, headers=list(r.headers))
                for r in records
            ]
            await asyncio.gather(*futures)
        except Exception as exc:
            raise translate_error(exc, "publish results", None) from exc

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
