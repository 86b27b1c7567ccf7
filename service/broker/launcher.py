"""Single-node Apache Kafka broker for trying casecloud locally, for the
benchmark and for the tests.

Standard library only (it never imports the rest of casecloud, so
``deploy/kafka/broker.py`` can load it by file path without the package's
dependencies). Run it through the package's command line::

    casecloud broker run [--port N] [--dir D] [--topic NAME[:PARTITIONS]]
    casecloud broker fetch-jars

or import it: ``from service.broker import KafkaBroker``.

The broker runs in KRaft combined mode (one JVM is both broker and controller,
``node.id=1``) and binds to 127.0.0.1 only. Its jars come from Maven Central
through ``pom.xml`` beside this module (shipped as package data) and are
cached (see :func:`default_jar_dir`).

Environment variables:

``CASECLOUD_KAFKA_JARS``
    directory holding the broker jars (default
    ``~/.cache/casecloud/kafka-<version>/lib``); filled by Maven when it lacks
    the Kafka jar.
``CASECLOUD_MVN``
    Maven executable (default: ``mvn`` on PATH).
``JAVA_HOME``
    if set, ``$JAVA_HOME/bin/java`` runs the broker, otherwise ``java`` on PATH.
``CASECLOUD_KAFKA_JAVA_OPTS``
    extra JVM options (split on whitespace), appended after the defaults.
"""

from __future__ import annotations

import argparse
import atexit
import base64
import fcntl
import os
import random
import shutil
import signal
import socket
import struct
import subprocess
import sys
import tempfile
import threading
import time
import uuid
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Dict, Iterable, List, Mapping, NamedTuple, Optional, Sequence

__all__ = [
    "KAFKA_VERSION",
    "BrokerError",
    "BrokerStartError",
    "KafkaBroker",
    "Listener",
    "default_jar_dir",
    "ensure_jars",
    "main",
]

HERE = Path(__file__).resolve().parent
POM = HERE / "pom.xml"
HOST = "127.0.0.1"
NODE_ID = 1
LOG_TAIL_LINES = 40
JARS_ENV = "CASECLOUD_KAFKA_JARS"
MVN_ENV = "CASECLOUD_MVN"
JAVA_OPTS_ENV = "CASECLOUD_KAFKA_JAVA_OPTS"
DEFAULT_JAVA_OPTS = (
    "-Xms128m",
    "-Xmx512m",
    "-XX:+UseG1GC",
    "-XX:MaxGCPauseMillis=20",
    # C1 only: the JVM is up in about 60% of the time on a busy 2-core machine;
    # peak throughput matters little for tests (override: -XX:TieredStopAtLevel=4)
    "-XX:TieredStopAtLevel=1",
    "-XX:+ExitOnOutOfMemoryError",
    "-XX:-UsePerfData",
    "-Djava.awt.headless=true",
    "-Djava.net.preferIPv4Stack=true",
)


class BrokerError(RuntimeError):
    """A broker operation (tool run, topic creation, ...) failed."""


class BrokerStartError(BrokerError):
    """The jars could not be fetched or the broker did not come up."""


def _read_kafka_version(pom: Path = POM) -> str:
    try:
        root = ET.parse(pom).getroot()
    except (OSError, ET.ParseError) as exc:
        raise BrokerError(f"cannot read the Kafka version from {pom}: {exc}") from exc
    ns = {"m": "http://maven.apache.org/POM/4.0.0"}
    node = root.find("m:properties/m:kafka.version", ns)
    if node is None or not (node.text or "").strip():
        raise BrokerError(f"{pom} has no <properties><kafka.version>; it must name the Kafka release")
    return node.text.strip()


KAFKA_VERSION = _read_kafka_version()
KAFKA_JAR = f"kafka_2.13-{KAFKA_VERSION}.jar"


# --------------------------------------------------------------------------
# jars


def default_jar_dir() -> Path:
    """``$CASECLOUD_KAFKA_JARS`` or ``~/.cache/casecloud/kafka-<version>/lib``."""
    env = os.environ.get(JARS_ENV)
    if env:
        return Path(env).expanduser().resolve()
    return Path.home() / ".cache" / "casecloud" / f"kafka-{KAFKA_VERSION}" / "lib"


def _tail_text(text: str, n: int = LOG_TAIL_LINES) -> str:
    lines = text.splitlines()
    return "\n".join(lines[-n:])


def ensure_jars(jar_dir: Optional[os.PathLike] = None, *, timeout: float = 1200.0) -> Path:
    """Make sure ``jar_dir`` holds the broker's runtime jars; return it.

    Runs Maven once (``dependency:copy-dependencies`` on ``pom.xml``) when the
    directory lacks ``kafka_2.13-<version>.jar``; otherwise does nothing.
    Concurrent callers (other processes too) wait on a lock file so Maven runs
    once. Raises :class:`BrokerStartError` with Maven's output tail on failure.
    """
    jar_dir = Path(jar_dir).expanduser().resolve() if jar_dir else default_jar_dir()
    if (jar_dir / KAFKA_JAR).is_file():
        return jar_dir
    mvn = os.environ.get(MVN_ENV) or shutil.which("mvn")
    if not mvn:
        raise BrokerStartError(
            f"Maven is needed to fetch the Kafka {KAFKA_VERSION} jars into {jar_dir}, "
            f"but no 'mvn' is on PATH and ${MVN_ENV} is unset; install it "
            f"(apt-get install -y maven) or point ${JARS_ENV} at a directory that "
            f"already holds {KAFKA_JAR}"
        )
    jar_dir.parent.mkdir(parents=True, exist_ok=True)
    lock_path = jar_dir.parent / f".{jar_dir.name}.lock"
    with open(lock_path, "w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        try:
            if (jar_dir / KAFKA_JAR).is_file():  # another process filled it
                return jar_dir
            if jar_dir.is_dir() and any(jar_dir.iterdir()):
                raise BrokerStartError(
                    f"jar directory {jar_dir} is not empty but has no {KAFKA_JAR}; "
                    f"expected an empty or missing directory (or one with Kafka "
                    f"{KAFKA_VERSION}'s jars). Empty it or set ${JARS_ENV} elsewhere"
                )
            tmp = Path(tempfile.mkdtemp(prefix=f".{jar_dir.name}.tmp-", dir=jar_dir.parent))
            cmd = [
                mvn, "-q", "-B", "-Dstyle.color=never", "-f", str(POM),
                "dependency:copy-dependencies", f"-DoutputDirectory={tmp}",
            ]
            try:
                try:
                    proc = subprocess.run(
                        cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                        text=True, timeout=timeout, stdin=subprocess.DEVNULL,
                    )
                except subprocess.TimeoutExpired as exc:
                    out = exc.output if isinstance(exc.output, str) else (exc.output or b"").decode(errors="replace")
                    raise BrokerStartError(
                        f"Maven did not finish within {timeout:.0f}s fetching Kafka jars\n"
                        f"command: {' '.join(cmd)}\n--- output tail ---\n{_tail_text(out)}"
                    ) from None
                if proc.returncode != 0 or not (tmp / KAFKA_JAR).is_file():
                    raise BrokerStartError(
                        f"Maven failed to fetch the Kafka {KAFKA_VERSION} jars "
                        f"(exit code {proc.returncode}"
                        + ("" if proc.returncode else f", but {KAFKA_JAR} is missing")
                        + f")\ncommand: {' '.join(cmd)}\n--- output tail ---\n{_tail_text(proc.stdout)}"
                    )
                if jar_dir.is_dir():
                    jar_dir.rmdir()  # empty, checked above
                tmp.rename(jar_dir)
            finally:
                if tmp.exists():
                    shutil.rmtree(tmp, ignore_errors=True)
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)
    return jar_dir


def _java_executable() -> str:
    home = os.environ.get("JAVA_HOME")
    if home:
        java = Path(home) / "bin" / "java"
        if not java.is_file():
            raise BrokerStartError(f"JAVA_HOME={home} has no bin/java; unset it or point it at a JDK 11+")
        return str(java)
    java = shutil.which("java")
    if not java:
        raise BrokerStartError("no 'java' on PATH and JAVA_HOME is unset; Kafka needs Java 11+ (apt-get install -y openjdk-17-jre-headless)")
    return java


# --------------------------------------------------------------------------
# a little of the Kafka wire protocol (classic, non-flexible request versions)

API_METADATA = 3
API_API_VERSIONS = 18
API_CREATE_TOPICS = 19

_ERROR_NAMES = {
    -1: "UNKNOWN_SERVER_ERROR", 3: "UNKNOWN_TOPIC_OR_PARTITION", 5: "LEADER_NOT_AVAILABLE",
    7: "REQUEST_TIMED_OUT", 17: "INVALID_TOPIC_EXCEPTION", 35: "UNSUPPORTED_VERSION",
    36: "TOPIC_ALREADY_EXISTS", 37: "INVALID_PARTITIONS", 38: "INVALID_REPLICATION_FACTOR",
    40: "INVALID_CONFIG", 41: "NOT_CONTROLLER", 42: "INVALID_REQUEST", 44: "POLICY_VIOLATION",
}


def _error_name(code: int) -> str:
    return _ERROR_NAMES.get(code, f"error code {code}")


class _Reader:
    def __init__(self, data: bytes) -> None:
        self.data, self.pos = data, 0

    def _take(self, fmt: str):
        (value,) = struct.unpack_from(fmt, self.data, self.pos)
        self.pos += struct.calcsize(fmt)
        return value

    def int8(self) -> int:
        return self._take(">b")

    def int16(self) -> int:
        return self._take(">h")

    def int32(self) -> int:
        return self._take(">i")

    def string(self) -> Optional[str]:
        n = self.int16()
        if n < 0:
            return None
        s = self.data[self.pos:self.pos + n].decode("utf-8")
        self.pos += n
        return s

    def array(self, item) -> List:
        n = self.int32()
        return [item() for _ in range(max(n, 0))]


def _str(s: Optional[str]) -> bytes:
    if s is None:
        return struct.pack(">h", -1)
    b = s.encode("utf-8")
    return struct.pack(">h", len(b)) + b


def _recv_exact(sock: socket.socket, n: int) -> bytes:
    buf = bytearray()
    while len(buf) < n:
        chunk = sock.recv(n - len(buf))
        if not chunk:
            raise ConnectionError(f"connection closed after {len(buf)} of {n} bytes")
        buf += chunk
    return bytes(buf)


def kafka_request(address: str, api_key: int, api_version: int, body: bytes, timeout: float = 10.0) -> _Reader:
    """Send one request to ``host:port`` and return a reader over the response body."""
    host, _, port = address.rpartition(":")
    corr = random.randint(1, 2**31 - 1)
    msg = struct.pack(">hhi", api_key, api_version, corr) + _str("casecloud-broker-launcher") + body
    with socket.create_connection((host, int(port)), timeout=timeout) as sock:
        sock.settimeout(timeout)
        sock.sendall(struct.pack(">i", len(msg)) + msg)
        (size,) = struct.unpack(">i", _recv_exact(sock, 4))
        data = _recv_exact(sock, size)
    reader = _Reader(data)
    got = reader.int32()
    if got != corr:
        raise ConnectionError(f"correlation id mismatch: sent {corr}, got {got}")
    return reader


def api_versions(address: str, timeout: float = 5.0) -> Dict[int, tuple]:
    """ApiVersions v0: ``{api_key: (min_version, max_version)}``."""
    r = kafka_request(address, API_API_VERSIONS, 0, b"", timeout)
    err = r.int16()
    if err:
        raise BrokerError(f"ApiVersions to {address} answered {_error_name(err)}")
    return {k: (lo, hi) for k, lo, hi in r.array(lambda: (r.int16(), r.int16(), r.int16()))}


def metadata(address: str, topics: Optional[Sequence[str]] = None, timeout: float = 5.0) -> dict:
    """Metadata v1. ``topics=None`` asks for all topics, ``[]`` for none.

    Returns ``{"brokers": {node_id: "host:port"}, "controller": id,
    "topics": {name: {"error": code, "partitions": {index: leader}}}}``.
    """
    if topics is None:
        body = struct.pack(">i", -1)
    else:
        body = struct.pack(">i", len(topics)) + b"".join(_str(t) for t in topics)
    r = kafka_request(address, API_METADATA, 1, body, timeout)
    brokers = {}
    for node_id, host, port, _rack in r.array(lambda: (r.int32(), r.string(), r.int32(), r.string())):
        brokers[node_id] = f"{host}:{port}"
    controller = r.int32()
    out_topics = {}

    def partition():
        err, index, leader = r.int16(), r.int32(), r.int32()
        r.array(r.int32)  # replicas
        r.array(r.int32)  # isr
        return index, (err, leader)

    for _ in range(max(r.int32(), 0)):
        err, name = r.int16(), r.string()
        r.int8()  # is_internal
        parts = dict(r.array(partition))
        out_topics[name] = {
            "error": err,
            "partitions": {i: leader for i, (perr, leader) in parts.items()},
            "partition_errors": {i: perr for i, (perr, _l) in parts.items() if perr},
        }
    return {"brokers": brokers, "controller": controller, "topics": out_topics}


def create_topics_request(
    address: str, name: str, partitions: int, replication_factor: int,
    configs: Mapping[str, str], timeout_ms: int, timeout: float,
) -> tuple:
    """CreateTopics v2 for one topic; returns ``(error_code, error_message)``."""
    topic = (
        _str(name) + struct.pack(">ih", partitions, replication_factor)
        + struct.pack(">i", 0)  # no manual assignment
        + struct.pack(">i", len(configs))
        + b"".join(_str(k) + _str(None if v is None else str(v)) for k, v in configs.items())
    )
    body = struct.pack(">i", 1) + topic + struct.pack(">ib", timeout_ms, 0)
    r = kafka_request(address, API_CREATE_TOPICS, 2, body, timeout)
    r.int32()  # throttle time
    results = r.array(lambda: (r.string(), r.int16(), r.string()))
    for got_name, err, msg in results:
        if got_name == name:
            return err, msg
    raise BrokerError(f"CreateTopics answer from {address} did not mention topic {name!r}: {results}")


# --------------------------------------------------------------------------
# broker


class Listener(NamedTuple):
    """One client listener of the broker.

    ``name`` is the listener name (upper case, e.g. ``"SASL"``), ``protocol``
    its security protocol (``PLAINTEXT``, ``SASL_PLAINTEXT``, ...), ``port``
    a fixed port or ``None`` for a free one picked at start.
    """

    name: str
    protocol: str = "PLAINTEXT"
    port: Optional[int] = None


_SECURITY_PROTOCOLS = ("PLAINTEXT", "SASL_PLAINTEXT", "SSL", "SASL_SSL")
_RUNNING: "set[KafkaBroker]" = set()
_RUNNING_LOCK = threading.Lock()


def _stop_all_at_exit() -> None:
    with _RUNNING_LOCK:
        brokers = list(_RUNNING)
    for broker in brokers:
        try:
            broker.stop(grace=5.0)
        except Exception:  # noqa: BLE001 - best effort at interpreter exit
            pass


atexit.register(_stop_all_at_exit)


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((HOST, 0))
        return s.getsockname()[1]


def _prop_escape(text: str, is_key: bool = False) -> str:
    out = []
    for i, ch in enumerate(text):
        if ch == "\\":
            out.append("\\\\")
        elif ch == "\n":
            out.append("\\n")
        elif ch == "\r":
            out.append("\\r")
        elif ch == "\t":
            out.append("\\t")
        elif is_key and ch in "=: #!":
            out.append("\\" + ch)
        elif not is_key and i == 0 and ch in " #!":
            out.append("\\" + ch)
        else:
            out.append(ch)
    return "".join(out)


def _new_cluster_id() -> str:
    """Kafka-style cluster id: 16 random bytes, base64url without padding."""
    while True:
        text = base64.urlsafe_b64encode(uuid.uuid4().bytes).decode("ascii").rstrip("=")
        if not text.startswith("-"):  # Kafka's own generator avoids these too
            return text


class KafkaBroker:
    """A single-node KRaft Kafka broker running as a child JVM on 127.0.0.1.

    ``work_dir`` holds everything the broker writes: ``server.properties``,
    ``log4j.properties``, ``broker.log`` (the JVM's console) and ``data/``
    (the log dirs). ``jar_dir`` defaults to :func:`default_jar_dir`. ``port``
    and ``controller_port`` default to free ports picked right before start.
    ``server_properties`` are written last, so they override the defaults.

    Adding a SASL_PLAINTEXT listener is one extra :class:`Listener` plus its
    properties; the PLAINTEXT listener stays for inter-broker traffic and the
    readiness check::

        broker = KafkaBroker(
            work_dir,
            extra_listeners=[Listener("SASL", "SASL_PLAINTEXT")],
            server_properties={
                "listener.name.sasl.sasl.enabled.mechanisms": "PLAIN",
                "listener.name.sasl.plain.sasl.jaas.config":
                    "org.apache.kafka.common.security.plain.PlainLoginModule required "
                    'username="admin" password="admin-secret" '
                    'user_admin="admin-secret" user_alice="alice-secret";',
            },
        )
        broker.start()
        broker.address("SASL")      # "127.0.0.1:<port>" for SASL clients
        broker.bootstrap_servers    # still the PLAINTEXT address

    The listener name goes lower case in ``listener.name.<name>.`` prefixes.

    SCRAM users are written into the cluster metadata when the storage is
    formatted (``kafka-storage format --add-scram``), so they exist from the
    first start: pass ``scram_credentials=["SCRAM-SHA-256=[name=bob,password=bob-secret]"]``
    and enable the mechanism on the listener::

        "listener.name.sasl.sasl.enabled.mechanisms": "PLAIN,SCRAM-SHA-256",
        "listener.name.sasl.scram-sha-256.sasl.jaas.config":
            "org.apache.kafka.common.security.scram.ScramLoginModule required;",

    They only take effect on a fresh data directory (a reused one is not
    formatted again).
    """

    def __init__(
        self,
        work_dir: os.PathLike,
        jar_dir: Optional[os.PathLike] = None,
        port: Optional[int] = None,
        controller_port: Optional[int] = None,
        server_properties: Optional[Mapping[str, object]] = None,
        extra_listeners: Iterable[Listener] = (),
        java_opts: Sequence[str] = (),
        log_level: str = "INFO",
        scram_credentials: Sequence[str] = (),
    ) -> None:
        self.work_dir = Path(work_dir).resolve()
        self.scram_credentials = [str(c) for c in scram_credentials]
        for cred in self.scram_credentials:
            if not (cred.startswith(("SCRAM-SHA-256=[", "SCRAM-SHA-512=[")) and cred.endswith("]") and "name=" in cred):
                raise ValueError(
                    f"scram credential {cred.split('password=')[0]!r}... is malformed; allowed: "
                    f"'SCRAM-SHA-256=[name=USER,password=SECRET]' or 'SCRAM-SHA-512=[...]'"
                )
        self.jar_dir = Path(jar_dir).expanduser().resolve() if jar_dir else default_jar_dir()
        self._fixed_ports = {"PLAINTEXT": port, "CONTROLLER": controller_port}
        self._listeners: List[Listener] = [Listener("PLAINTEXT", "PLAINTEXT", port)]
        for lst in extra_listeners:
            lst = Listener(*lst)
            if lst.name.upper() != lst.name or lst.name in ("PLAINTEXT", "CONTROLLER"):
                raise ValueError(
                    f"extra listener name {lst.name!r} is not allowed: use an upper-case name "
                    f"other than PLAINTEXT and CONTROLLER (e.g. 'SASL')"
                )
            if lst.protocol not in _SECURITY_PROTOCOLS:
                raise ValueError(
                    f"listener {lst.name!r} has protocol {lst.protocol!r}; allowed: {', '.join(_SECURITY_PROTOCOLS)}"
                )
            self._listeners.append(lst)
        for name, p in [("port", port), ("controller_port", controller_port)] + [
            (f"listener {lst.name} port", lst.port) for lst in self._listeners[1:]
        ]:
            if p is not None and not (0 < int(p) < 65536):
                raise ValueError(f"{name}={p!r} is out of range; allowed 1..65535 or None for a free port")
        self.server_properties = {str(k): str(v) for k, v in (server_properties or {}).items()}
        self.java_opts = list(java_opts)
        self.log_level = log_level
        self.ports: Dict[str, int] = {}
        self.proc: Optional[subprocess.Popen] = None
        self.command: List[str] = []
        self.start_seconds: Optional[float] = None
        self._log_file = None
        self._log_offset = 0

    # -- paths and addresses ------------------------------------------------

    @property
    def log_path(self) -> Path:
        return self.work_dir / "broker.log"

    @property
    def data_dir(self) -> Path:
        return self.work_dir / "data"

    @property
    def properties_path(self) -> Path:
        return self.work_dir / "server.properties"

    @property
    def classpath(self) -> str:
        return str(self.jar_dir / "*")

    def address(self, listener: str = "PLAINTEXT") -> str:
        """``"127.0.0.1:PORT"`` of a listener (after :meth:`start`)."""
        if listener not in self.ports:
            known = ", ".join(lst.name for lst in self._listeners)
            state = "started" if self.ports else "not started yet"
            raise BrokerError(f"no address for listener {listener!r} (broker {state}; listeners: {known})")
        return f"{HOST}:{self.ports[listener]}"

    @property
    def bootstrap_servers(self) -> str:
        return self.address("PLAINTEXT")

    def is_running(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def log_tail(self, n: int = LOG_TAIL_LINES) -> str:
        try:
            with open(self.log_path, "rb") as f:
                f.seek(0, os.SEEK_END)
                f.seek(max(0, f.tell() - 256 * 1024))
                text = f.read().decode("utf-8", errors="replace")
        except OSError as exc:
            return f"(no broker log at {self.log_path}: {exc})"
        return _tail_text(text, n)

    # -- config -------------------------------------------------------------

    def _pick_ports(self) -> None:
        taken = set()
        ports: Dict[str, int] = {}
        for lst in self._listeners + [Listener("CONTROLLER", "PLAINTEXT", self._fixed_ports["CONTROLLER"])]:
            p = lst.port
            while p is None or p in taken:
                p = _free_port()
            taken.add(p)
            ports[lst.name] = int(p)
        self.ports = ports

    def _all_ports_free_picked(self) -> bool:
        return all(lst.port is None for lst in self._listeners) and self._fixed_ports["CONTROLLER"] is None

    def server_config(self) -> Dict[str, str]:
        """The properties written to ``server.properties`` (after ports are picked)."""
        p = self.ports
        client = self._listeners
        props = {
            "process.roles": "broker,controller",
            "node.id": str(NODE_ID),
            "controller.quorum.voters": f"{NODE_ID}@{HOST}:{p['CONTROLLER']}",
            "listeners": ",".join(f"{lst.name}://{HOST}:{p[lst.name]}" for lst in client)
            + f",CONTROLLER://{HOST}:{p['CONTROLLER']}",
            "advertised.listeners": ",".join(f"{lst.name}://{HOST}:{p[lst.name]}" for lst in client),
            "listener.security.protocol.map": ",".join(f"{lst.name}:{lst.protocol}" for lst in client)
            + ",CONTROLLER:PLAINTEXT",
            "inter.broker.listener.name": "PLAINTEXT",
            "controller.listener.names": "CONTROLLER",
            "log.dirs": str(self.data_dir),
            "num.partitions": "1",
            "default.replication.factor": "1",
            "auto.create.topics.enable": "true",
            "offsets.topic.replication.factor": "1",
            "offsets.topic.num.partitions": "1",
            "transaction.state.log.replication.factor": "1",
            "transaction.state.log.min.isr": "1",
            "transaction.state.log.num.partitions": "1",
            "min.insync.replicas": "1",
            "group.initial.rebalance.delay.ms": "0",
            "num.network.threads": "2",
            "num.io.threads": "4",
            "num.recovery.threads.per.data.dir": "1",
            "log.cleaner.dedupe.buffer.size": str(16 * 1024 * 1024),
            "delete.topic.enable": "true",
        }
        props.update(self.server_properties)
        return props

    def _write_config(self) -> None:
        self.work_dir.mkdir(parents=True, exist_ok=True)
        lines = ["# written by casecloud's broker launcher (service/broker/launcher.py); rewritten at every start"]
        lines += [f"{_prop_escape(k, True)}={_prop_escape(v)}" for k, v in self.server_config().items()]
        self.properties_path.write_text("\n".join(lines) + "\n", encoding="utf-8")
        level = self.log_level.upper()
        quiet = "WARN" if level in ("INFO", "DEBUG", "TRACE") else level
        (self.work_dir / "log4j.properties").write_text(
            "\n".join([
                f"log4j.rootLogger={level}, stdout",
                "log4j.appender.stdout=org.apache.log4j.ConsoleAppender",
                "log4j.appender.stdout.layout=org.apache.log4j.PatternLayout",
                "log4j.appender.stdout.layout.ConversionPattern=[%d] %p %m (%c)%n",
                # the "Kafka Server started" line, whatever the level
                "log4j.logger.kafka.server.KafkaRaftServer=INFO",
                f"log4j.logger.kafka.request.logger={quiet}",
                f"log4j.logger.state.change.logger={quiet}",
                f"log4j.logger.kafka.log.LogCleaner={quiet}",
                f"log4j.logger.org.apache.kafka.storage.internals.log={quiet}",
                f"log4j.logger.kafka.log.UnifiedLog={quiet}",
                f"log4j.logger.org.apache.kafka.clients.admin.AdminClientConfig={quiet}",
                f"log4j.logger.org.apache.kafka.common.config.AbstractConfig={quiet}",
                f"log4j.logger.kafka.server.KafkaConfig={quiet}",
                "",
            ]),
            encoding="utf-8",
        )

    def _java_cmd(self, main_class: str, *args: str, tool: bool = False) -> List[str]:
        """``java ... MAIN ARGS``: the broker's JVM options, or for a short-lived
        tool (``tool=True``) a small heap and WARN logs on stderr."""
        if tool:
            self._write_tools_log4j()
            opts = [o for o in DEFAULT_JAVA_OPTS if not o.startswith("-Xm")]
            opts += ["-Xms32m", "-Xmx256m"]
            log4j = self.work_dir / "tools-log4j.properties"
        else:
            opts = list(DEFAULT_JAVA_OPTS) + self.java_opts
            log4j = self.work_dir / "log4j.properties"
        opts += os.environ.get(JAVA_OPTS_ENV, "").split()
        if any(o.startswith("-XX:+Use") and o.endswith("GC") and o != "-XX:+UseG1GC" for o in opts):
            # another collector was asked for: drop the default G1 settings (the JVM
            # refuses two collectors); other options simply repeat, the last one wins
            opts = [o for o in opts if o not in ("-XX:+UseG1GC", "-XX:MaxGCPauseMillis=20")]
        return [
            _java_executable(), *opts, f"-Dlog4j.configuration=file:{log4j}",
            "-cp", self.classpath, main_class, *args,
        ]

    # -- tools --------------------------------------------------------------

    def run_tool(self, main_class: str, *args: str, timeout: float = 120.0, check: bool = True) -> subprocess.CompletedProcess:
        """Run a Kafka Java tool (e.g. ``org.apache.kafka.tools.TopicCommand``)
        with the broker's jars; raise :class:`BrokerError` with its output if
        it fails and ``check`` is true."""
        ensure_jars(self.jar_dir)
        cmd = self._java_cmd(main_class, *args, tool=True)
        try:
            proc = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                  timeout=timeout, stdin=subprocess.DEVNULL)
        except subprocess.TimeoutExpired:
            raise BrokerError(f"{main_class} did not finish within {timeout:.0f}s\ncommand: {' '.join(cmd)}") from None
        if check and proc.returncode != 0:
            raise BrokerError(
                f"{main_class} failed with exit code {proc.returncode}\ncommand: {' '.join(cmd)}\n"
                f"--- stdout tail ---\n{_tail_text(proc.stdout)}\n--- stderr tail ---\n{_tail_text(proc.stderr)}"
            )
        return proc

    def _write_tools_log4j(self) -> None:
        self.work_dir.mkdir(parents=True, exist_ok=True)
        (self.work_dir / "tools-log4j.properties").write_text(
            "log4j.rootLogger=WARN, stderr\n"
            "log4j.appender.stderr=org.apache.log4j.ConsoleAppender\n"
            "log4j.appender.stderr.Target=System.err\n"
            "log4j.appender.stderr.layout=org.apache.log4j.PatternLayout\n"
            "log4j.appender.stderr.layout.ConversionPattern=[%d] %p %m (%c)%n\n",
            encoding="utf-8",
        )

    def topic_command(self, *args: str, timeout: float = 120.0) -> str:
        """``kafka-topics.sh --bootstrap-server <this broker> ARGS``; returns stdout."""
        return self.run_tool("org.apache.kafka.tools.TopicCommand", "--bootstrap-server",
                             self.bootstrap_servers, *args, timeout=timeout).stdout

    def create_topic(
        self,
        name: str,
        partitions: int = 1,
        *,
        replication_factor: int = 1,
        configs: Optional[Mapping[str, object]] = None,
        if_not_exists: bool = False,
        timeout: float = 30.0,
    ) -> None:
        """Create a topic and wait until every partition has a leader.

        Talks the Kafka protocol directly (CreateTopics, then Metadata), which
        takes milliseconds where a Java admin tool needs a JVM start (~2 s).
        Raises :class:`BrokerError` if the broker refuses, e.g. when the topic
        exists and ``if_not_exists`` is false.
        """
        if not isinstance(partitions, int) or partitions < 1:
            raise ValueError(f"create_topic({name!r}): partitions={partitions!r}; allowed: an int >= 1")
        cfg = {str(k): str(v) for k, v in (configs or {}).items()}
        addr = self.bootstrap_servers
        deadline = time.monotonic() + timeout
        while True:
            err, msg = create_topics_request(addr, name, partitions, replication_factor, cfg,
                                             int(timeout * 1000), timeout)
            if err == 0 or (err == 36 and if_not_exists):
                break
            if err in (7, 41) and time.monotonic() < deadline:  # retriable
                time.sleep(0.1)
                continue
            raise BrokerError(
                f"creating topic {name!r} (partitions={partitions}, replication_factor={replication_factor}, "
                f"configs={cfg}) on {addr} failed: {_error_name(err)}" + (f": {msg}" if msg else "")
            )
        last = None
        while time.monotonic() < deadline:
            last = metadata(addr, [name], timeout=timeout).get("topics", {}).get(name)
            if last and last["error"] == 0 and last["partitions"] and all(
                leader >= 0 for leader in last["partitions"].values()
            ):
                return
            time.sleep(0.05)
        raise BrokerError(f"topic {name!r} on {addr} has no leader for every partition after {timeout}s: {last}")

    def list_topics(self) -> List[str]:
        return sorted(metadata(self.bootstrap_servers, None)["topics"])

    # -- lifecycle ----------------------------------------------------------

    def _format_storage(self) -> None:
        if (self.data_dir / "meta.properties").exists():
            return  # formatted before: restart on the same data
        scram = [arg for cred in self.scram_credentials for arg in ("--add-scram", cred)]
        cmd = self._java_cmd("kafka.tools.StorageTool", "format", "-t", _new_cluster_id(),
                             "-c", str(self.properties_path), *scram, tool=True)
        proc = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                              timeout=120, stdin=subprocess.DEVNULL)
        if proc.returncode != 0:
            raise BrokerStartError(
                f"formatting Kafka storage in {self.data_dir} failed (exit code {proc.returncode})\n"
                f"command: {' '.join(cmd)}\n--- output tail ---\n{_tail_text(proc.stdout)}"
            )

    def start(self, timeout: float = 90.0) -> "KafkaBroker":
        """Fetch jars if needed, write config, format storage, launch the JVM
        and wait until it answers ApiVersions and a Metadata request listing
        itself. Raises :class:`BrokerStartError` on failure or timeout (the
        JVM is killed then). Free ports are picked at the first start; if one
        was taken in the meantime the start is retried with new ports (twice
        at most; only when no port was given).

        Starting again after :meth:`stop` is a restart: the same ports and the
        same data directory (topics, records, committed offsets kept), so
        clients that were connected reconnect to the same address. That is how
        a broker outage is made on purpose (``stop()``, wait, ``start()``)."""
        if self.is_running():
            raise BrokerStartError(f"broker in {self.work_dir} is already running at {self.bootstrap_servers}")
        ensure_jars(self.jar_dir)
        restart = bool(self.ports)
        attempts = 3 if self._all_ports_free_picked() and not restart else 1
        for attempt in range(1, attempts + 1):
            fresh = not (self.data_dir / "meta.properties").exists()
            try:
                self._start_once(timeout, pick_ports=not restart)
                return self
            except BrokerStartError:
                log = self._attempt_log()
                bind_clash = "Address already in use" in log or "BindException" in log
                if attempt < attempts and bind_clash:
                    if fresh:
                        shutil.rmtree(self.data_dir, ignore_errors=True)
                    continue
                raise
        raise AssertionError("unreachable")

    def restart(self, down_seconds: float = 0.0, timeout: float = 90.0) -> "KafkaBroker":
        """:meth:`stop`, stay down ``down_seconds``, :meth:`start` again on the same ports and data."""
        if not self.ports:
            raise BrokerError(f"broker in {self.work_dir} was never started; start() it before restart()")
        self.stop()
        time.sleep(max(0.0, down_seconds))
        return self.start(timeout=timeout)

    def _start_once(self, timeout: float, pick_ports: bool = True) -> None:
        t0 = time.monotonic()
        if pick_ports:
            self._pick_ports()
        self._write_config()
        self._format_storage()
        self.command = self._java_cmd("kafka.Kafka", str(self.properties_path))
        launch = list(self.command)
        if threading.current_thread() is threading.main_thread() and shutil.which("setpriv"):
            # the JVM gets SIGKILL if this process dies without running atexit
            launch = [shutil.which("setpriv"), "--pdeathsig", "KILL", *launch]
        self._log_file = open(self.log_path, "ab")
        self._log_offset = self._log_file.tell()
        self._log_file.write(f"\n=== start {time.strftime('%Y-%m-%d %H:%M:%S')}: {' '.join(self.command)}\n".encode())
        self._log_file.flush()
        try:
            self.proc = subprocess.Popen(
                launch, stdout=self._log_file, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                cwd=self.work_dir, start_new_session=True,
            )
        except OSError as exc:
            self._cleanup_after_exit()
            raise BrokerStartError(f"cannot launch the broker: {exc}\ncommand: {' '.join(launch)}") from exc
        with _RUNNING_LOCK:
            _RUNNING.add(self)
        deadline = t0 + timeout
        last_error = "no attempt yet"
        addr = self.bootstrap_servers
        while True:
            code = self.proc.poll()
            if code is not None:
                self._cleanup_after_exit()
                raise self._start_error(f"the broker exited with exit code {code} before it was ready")
            versions = md = None
            try:
                versions = api_versions(addr, timeout=2.0)
                md = metadata(addr, [], timeout=2.0)
            except (OSError, ConnectionError, struct.error) as exc:
                last_error = f"{type(exc).__name__}: {exc}"
            except BrokerError as exc:
                last_error = str(exc)
            if versions is not None:
                for key, ver in ((API_METADATA, 1), (API_CREATE_TOPICS, 2)):
                    lo, hi = versions.get(key, (None, None))
                    if lo is None or not lo <= ver <= hi:
                        self.stop(grace=5.0)
                        raise self._start_error(
                            f"the broker does not support API {key} version {ver} (it allows {lo}..{hi}); "
                            f"this launcher needs Kafka 3.x, pom.xml asks for {KAFKA_VERSION}")
            if md is not None:
                if NODE_ID in md["brokers"] and md["controller"] >= 0:
                    self.start_seconds = time.monotonic() - t0
                    return
                last_error = f"metadata not ready yet: {md}"
            if time.monotonic() > deadline:
                self.stop(grace=5.0)
                raise self._start_error(
                    f"the broker was not ready within {timeout:.0f}s (last readiness check: {last_error})")
            time.sleep(0.1)

    def _attempt_log(self) -> str:
        """The broker log written since the current start attempt began."""
        try:
            with open(self.log_path, "rb") as f:
                f.seek(self._log_offset)
                return f.read(8 * 1024 * 1024).decode("utf-8", errors="replace")
        except OSError:
            return ""

    def _start_error(self, what: str) -> BrokerStartError:
        code = self.proc.returncode if self.proc is not None else None
        errors = [
            line[:600] for line in self._attempt_log().splitlines()
            if any(mark in line for mark in (" ERROR ", " FATAL ", "Exception", "Error:", "Error occurred"))
        ][:12]
        return BrokerStartError(
            f"Kafka broker in {self.work_dir} failed to start: {what}\n"
            f"command: {' '.join(self.command)}\n"
            f"exit code: {code}"
            + (" (killed by this launcher)" if code is not None and (code < 0 or code in (137, 143)) else "")
            + "\n"
            + (f"--- first error lines of {self.log_path} ---\n" + "\n".join(errors) + "\n" if errors else "")
            + f"--- last {LOG_TAIL_LINES} lines of {self.log_path} ---\n{self.log_tail()}"
        )

    def _cleanup_after_exit(self) -> None:
        with _RUNNING_LOCK:
            _RUNNING.discard(self)
        if self._log_file is not None:
            self._log_file.close()
            self._log_file = None

    def stop(self, grace: float = 20.0) -> Optional[int]:
        """SIGTERM, then SIGKILL after ``grace`` seconds. Returns the exit code
        (``None`` if nothing was running). Safe to call twice."""
        proc = self.proc
        if proc is None:
            return None
        if proc.poll() is None:
            try:
                proc.send_signal(signal.SIGTERM)
                proc.wait(timeout=grace)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=30)
            except ProcessLookupError:
                pass
        self._cleanup_after_exit()
        return proc.returncode

    def __enter__(self) -> "KafkaBroker":
        return self.start()

    def __exit__(self, *exc_info) -> None:
        self.stop()

    def __repr__(self) -> str:
        state = f"running at {self.bootstrap_servers}" if self.is_running() else "stopped"
        return f"<KafkaBroker {KAFKA_VERSION} {state} in {self.work_dir}>"


# --------------------------------------------------------------------------
# command line


DEFAULT_PORT = 9092  # what the documented deployment configs point at


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """The ``run`` and ``fetch-jars`` sub-commands (shared by ``casecloud broker`` and the script)."""
    sub = parser.add_subparsers(dest="broker_command", required=True, metavar="ACTION")
    run = sub.add_parser(
        "run", help="start a broker and keep it in the foreground until Ctrl-C",
        description=f"Start a local single-node Apache Kafka {KAFKA_VERSION} broker on 127.0.0.1 and keep it in "
                    "the foreground until Ctrl-C or SIGTERM. Needs Java 11+ and, on the first run, Maven (the jars "
                    "come from Maven Central and are cached).")
    run.add_argument("--port", type=int, default=DEFAULT_PORT,
                     help=f"client (PLAINTEXT) port (default {DEFAULT_PORT}, as in the documented configs; 0: a free one)")
    run.add_argument("--controller-port", type=int, default=None, help="KRaft controller port; default: a free one")
    run.add_argument("--dir", default=None,
                     help="work directory (kept, and reused on the next run: topics and records survive); "
                          "default: a temporary one removed at exit")
    run.add_argument("--jars", default=None, help=f"jar directory (default: ${JARS_ENV} or {default_jar_dir()})")
    run.add_argument("--timeout", type=float, default=90.0, help="seconds to wait for the broker (default 90)")
    run.add_argument("--topic", action="append", default=[], metavar="NAME[:PARTITIONS]",
                     help="create this topic once started, unless it exists (repeatable)")
    fetch = sub.add_parser("fetch-jars", help="only fetch the jars (runs Maven unless cached) and print their directory")
    fetch.add_argument("--jars", default=None, help=f"jar directory (default: ${JARS_ENV} or {default_jar_dir()})")


def _parse_topics(specs: Sequence[str]) -> List[tuple]:
    topics = []
    for spec in specs:
        name, _, parts = spec.partition(":")
        if not name:
            raise ValueError(f"--topic {spec!r}: a topic name is needed before ':'")
        try:
            count = int(parts) if parts else 1
        except ValueError:
            raise ValueError(f"--topic {spec!r}: the partition count after ':' must be an integer >= 1, given {parts!r}") from None
        if count < 1:
            raise ValueError(f"--topic {spec!r}: the partition count must be >= 1, given {count}")
        topics.append((name, count))
    return topics


def run_command(args: argparse.Namespace) -> int:
    """Handler of ``run`` / ``fetch-jars`` (``args.broker_command``)."""
    if args.broker_command == "fetch-jars":
        t0 = time.monotonic()
        try:
            jars = ensure_jars(args.jars)
        except BrokerStartError as exc:
            print(exc, file=sys.stderr)
            return 1
        print(jars, f"({time.monotonic() - t0:.1f}s)", flush=True)
        return 0

    try:
        topics = _parse_topics(args.topic)
        port = None if args.port == 0 else args.port
        tmp = None
        work_dir = args.dir
        if work_dir is None:
            tmp = tempfile.mkdtemp(prefix="casecloud-kafka-")
            work_dir = tmp
        broker = KafkaBroker(work_dir, jar_dir=args.jars, port=port, controller_port=args.controller_port)
    except ValueError as exc:
        print(f"broker run: {exc}", file=sys.stderr)
        return 2
    if port is not None:
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
            if probe.connect_ex((HOST, port)) == 0:
                print(f"broker run: port {port} on {HOST} is already in use (another broker?); "
                      f"stop it, or give --port N (0 for a free one)", file=sys.stderr)
                if tmp is not None:
                    shutil.rmtree(tmp, ignore_errors=True)
                return 1
    stopping = threading.Event()

    def on_signal(signum, _frame):
        stopping.set()

    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGTERM, on_signal)
    try:
        print(f"starting Kafka {KAFKA_VERSION} in {broker.work_dir} (log: {broker.log_path}) ...", flush=True)
        try:
            broker.start(timeout=args.timeout)
            for name, parts in topics:
                broker.create_topic(name, parts, if_not_exists=True)
                print(f"topic {name} ({parts} partition{'s' if parts > 1 else ''})", flush=True)
        except BrokerError as exc:
            print(exc, file=sys.stderr)
            return 1
        print(f"Kafka broker ready in {broker.start_seconds:.1f}s", flush=True)
        print(f"bootstrap servers: {broker.bootstrap_servers}", flush=True)
        print("press Ctrl-C to stop", flush=True)
        try:
            while not stopping.wait(1.0):
                if not broker.is_running():
                    print(f"the broker exited with code {broker.proc.returncode}; last log lines:\n{broker.log_tail()}",
                          file=sys.stderr)
                    return 1
        except KeyboardInterrupt:
            pass
        print("stopping ...", flush=True)
        return 0
    finally:
        broker.stop()
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)


def main(argv: Optional[Sequence[str]] = None, prog: str = "casecloud broker") -> int:
    """The launcher's command line on its own (``deploy/kafka/broker.py`` uses it)."""
    parser = argparse.ArgumentParser(
        prog=prog, description=f"Local single-node Apache Kafka {KAFKA_VERSION} broker (127.0.0.1 only).")
    add_arguments(parser)
    return run_command(parser.parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())
