"""Kafka security end to end, against a real broker with authenticated listeners.

The broker (deploy/kafka/broker.py, started once for this module) keeps its
PLAINTEXT listener for set-up and verification and adds:

* ``SASL``    SASL_PLAINTEXT with PLAIN (users in the JAAS config, the
              recipe in the KafkaBroker docstring) and SCRAM-SHA-256/512
              (users written at storage format time, ``--add-scram``);
* ``TLS``     SSL requiring a client certificate (mutual TLS);
* ``SASLTLS`` SASL_SSL with SCRAM-SHA-512.

Certificates come from a throw-away CA made with ``openssl`` for each run;
the broker's certificate names 127.0.0.1, which the client verifies.

Checked: the service consumes and publishes through each kind of listener
with credentials from the config file and the environment; wrong credentials
and wrong TLS trust end the service with one readable line naming the broker
and the cause; the password appears in no log, error or ``repr``; the metrics
endpoint listens on the configured address only.
"""

from __future__ import annotations

import asyncio
import os
import re
import shutil
import socket
import subprocess
import sys
import urllib.request
from pathlib import Path

import orjson
import pytest

from kafka_helpers import newest_step, produce, read_all, season_messages, wait_for
from schemas import KafkaSettings, SpecError, load_deployment_config
from service.errors import ConfigError, TransportAuthError, TransportError
from service.transports.base import OutRecord
from service.transports.kafka import KafkaTransport

pytestmark = pytest.mark.integration

ADMIN_PASSWORD = "admin-Secret-4bd1"
ALICE_PASSWORD = "alice-Secret-93c2"   # PLAIN
BOB_PASSWORD = "bob-Secret-d07e"       # SCRAM-SHA-256 and SCRAM-SHA-512
WRONG_PASSWORD = "not-the-Password-8f1a"
SECRETS = (ADMIN_PASSWORD, ALICE_PASSWORD, BOB_PASSWORD, WRONG_PASSWORD)


# --------------------------------------------------------------------------- certificates


def _openssl() -> str:
    path = shutil.which("openssl")
    if path is None:
        pytest.fail("openssl is not installed (needed to make test certificates): apt-get install -y openssl")
    return path


def _run_openssl(*args: str) -> None:
    done = subprocess.run([_openssl(), *args], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, f"openssl {' '.join(args)} failed:\n{done.stderr}"


def _make_ca(d: Path, name: str) -> None:
    _run_openssl(
        "req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
        "-keyout", str(d / f"{name}.key"), "-out", str(d / f"{name}.pem"), "-days", "2", "-subj", f"/CN={name}",
        "-addext", "basicConstraints=critical,CA:TRUE", "-addext", "keyUsage=critical,keyCertSign,cRLSign",
    )


def _make_leaf(d: Path, ca: str, name: str, subject: str, extensions: str) -> None:
    _run_openssl(
        "req", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
        "-keyout", str(d / f"{name}.key"), "-out", str(d / f"{name}.csr"), "-subj", subject,
    )
    (d / f"{name}.ext").write_text(extensions)
    _run_openssl(
        "x509", "-req", "-in", str(d / f"{name}.csr"), "-CA", str(d / f"{ca}.pem"), "-CAkey", str(d / f"{ca}.key"),
        "-CAcreateserial", "-out", str(d / f"{name}.pem"), "-days", "2", "-extfile", str(d / f"{name}.ext"),
    )


@pytest.fixture(scope="module")
def pki(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("pki")
    _make_ca(d, "ca")
    _make_ca(d, "rogue-ca")  # trusted by nobody
    _make_leaf(d, "ca", "broker", "/CN=127.0.0.1", "subjectAltName=IP:127.0.0.1\nextendedKeyUsage=serverAuth\n")
    _make_leaf(d, "ca", "client", "/CN=casecloud", "extendedKeyUsage=clientAuth\n")
    (d / "broker-keystore.pem").write_text((d / "broker.key").read_text() + (d / "broker.pem").read_text())
    return d


# --------------------------------------------------------------------------- broker


@pytest.fixture(scope="module")
def secure_broker(kafka_broker_module, pki, tmp_path_factory):
    b = kafka_broker_module
    scram = "org.apache.kafka.common.security.scram.ScramLoginModule required;"
    keystore = {"ssl.keystore.type": "PEM", "ssl.keystore.location": str(pki / "broker-keystore.pem")}
    props = {
        # SASL_PLAINTEXT: PLAIN (the KafkaBroker docstring recipe) and both SCRAM variants.
        "listener.name.sasl.sasl.enabled.mechanisms": "PLAIN,SCRAM-SHA-256,SCRAM-SHA-512",
        "listener.name.sasl.plain.sasl.jaas.config": (
            "org.apache.kafka.common.security.plain.PlainLoginModule required "
            f'username="admin" password="{ADMIN_PASSWORD}" '
            f'user_admin="{ADMIN_PASSWORD}" user_alice="{ALICE_PASSWORD}";'
        ),
        "listener.name.sasl.scram-sha-256.sasl.jaas.config": scram,
        "listener.name.sasl.scram-sha-512.sasl.jaas.config": scram,
        # SSL with client certificates.
        **{f"listener.name.tls.{k}": v for k, v in keystore.items()},
        "listener.name.tls.ssl.truststore.type": "PEM",
        "listener.name.tls.ssl.truststore.location": str(pki / "ca.pem"),
        "listener.name.tls.ssl.client.auth": "required",
        # SASL_SSL with SCRAM-SHA-512.
        **{f"listener.name.sasltls.{k}": v for k, v in keystore.items()},
        "listener.name.sasltls.sasl.enabled.mechanisms": "SCRAM-SHA-512",
        "listener.name.sasltls.scram-sha-512.sasl.jaas.config": scram,
    }
    broker = b.KafkaBroker(
        tmp_path_factory.mktemp("secure-kafka"),
        extra_listeners=[b.Listener("SASL", "SASL_PLAINTEXT"), b.Listener("TLS", "SSL"), b.Listener("SASLTLS", "SASL_SSL")],
        server_properties=props,
        scram_credentials=[
            f"SCRAM-SHA-256=[name=bob,password={BOB_PASSWORD}]",
            f"SCRAM-SHA-512=[name=bob,password={BOB_PASSWORD}]",
        ],
    )
    broker.start(timeout=120)
    try:
        yield broker
    finally:
        broker.stop()


# --------------------------------------------------------------------------- service helpers

STREAM = "harbour-ed"
DAYS = 6


def _service_config(path: Path, *, bootstrap: str, topic: str, group: str, checkpoint_dir: Path, kafka_extra: str = "",
                    max_message_bytes: int = 65536, metrics: str = "enabled = false") -> Path:
    path.write_text(
        f"""
transport = "kafka"

[service]
seed = 5
checkpoint_dir = "{checkpoint_dir}"
max_message_bytes = {max_message_bytes}

[metrics]
{metrics}

[kafka]
bootstrap_servers = "{bootstrap}"
group_id = "{group}"
input_topic = "{topic}"
estimates_topic = "{topic}.estimates"
alerts_topic = "{topic}.alerts"
dead_letter_topic = "{topic}.dead-letters"
session_timeout_ms = 6000
{kafka_extra}

[[streams]]
id = "{STREAM}"
model = "seir"
start = "2025-09-01"
particles = 300
forecast_trajectories = 50
"""
    )
    return path


class _Service:
    """``casecloud serve`` as a child process with extra environment; output in a log file."""

    def __init__(self, config: Path, log: Path, env: dict[str, str] | None = None) -> None:
        self.log = log
        self._out = open(log, "wb")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--config", str(config)],
            stdout=self._out, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
            env={**os.environ, "PYTHONUNBUFFERED": "1", **(env or {})},
        )

    def alive(self) -> bool:
        return self.proc.poll() is None

    def log_tail(self, n: int = 40) -> str:
        return "\n".join(self.log.read_text(errors="replace").splitlines()[-n:])

    def wait(self, timeout: float) -> int:
        try:
            return self.proc.wait(timeout)
        finally:
            self._out.close()

    def stop(self, timeout: float = 60) -> int:
        if self.alive():
            self.proc.terminate()
        return self.wait(timeout)

    def kill(self) -> None:
        if self.alive():
            self.proc.kill()
        self.wait(30)


def _assert_no_secret(text: str, where: str) -> None:
    for secret in SECRETS:
        assert secret not in text, f"a password appears in {where}"


def _kcat() -> str:
    path = shutil.which("kcat")
    if path is None:
        pytest.fail("kcat is not installed: run `apt-get install -y kcat` (the CI script does)")
    return path


def _kcat_read(address: str, topic: str, mechanism: str, user: str, password: str) -> list[dict]:
    """Read a topic from the beginning with kcat (librdkafka), authenticating with SASL."""
    done = subprocess.run(
        [_kcat(), "-C", "-b", address, "-t", topic, "-o", "beginning", "-e", "-J", "-q",
         "-X", "security.protocol=SASL_PLAINTEXT", "-X", f"sasl.mechanisms={mechanism}",
         "-X", f"sasl.username={user}", "-X", f"sasl.password={password}"],
        capture_output=True, timeout=60,
    )
    assert done.returncode == 0, done.stderr.decode(errors="replace")
    return [orjson.loads(line) for line in done.stdout.splitlines() if line.strip()]


def _run_service_through(secure_broker, tmp_path, name: str, listener: str, kafka_extra: str, env: dict[str, str]):
    """Produce a short season (plus an oversized record) through the PLAINTEXT
    listener, run the service against ``listener`` until every day is applied,
    stop it gracefully; return (estimates, dead letters, service log text)."""
    topic = f"secure.{name}"
    secure_broker.create_topic(topic, 1)
    messages = season_messages(STREAM, DAYS, seed=4)
    oversized = b'{"stream": "harbour-ed", "period": "2025-09-30", "counts": {"onsets": 1}, "metadata": {"pad": "' + b"x" * 2048 + b'"}}'
    produce(secure_broker.bootstrap_servers, topic, [(STREAM.encode(), m) for m in messages] + [(STREAM.encode(), oversized)])
    ckpt = tmp_path / f"{name}-ckpt"
    config = _service_config(
        tmp_path / f"{name}.toml", bootstrap=secure_broker.address(listener), topic=topic, group=f"g-{name}",
        checkpoint_dir=ckpt, kafka_extra=kafka_extra, max_message_bytes=1024,
    )
    service = _Service(config, tmp_path / f"{name}.log", env)
    try:
        wait_for(lambda: newest_step(ckpt, STREAM) == DAYS, 120, f"{DAYS} days applied over {listener}", service)
        dead = wait_for(lambda: read_all(secure_broker.bootstrap_servers, f"{topic}.dead-letters", 10), 60,
                        "the oversized record's dead letter", service)
        assert service.stop() == 0, service.log_tail()
    finally:
        service.kill()
    estimates = read_all(secure_broker.bootstrap_servers, f"{topic}.estimates")
    return topic, estimates, dead, service.log.read_text(errors="replace")


# --------------------------------------------------------------------------- tests


def test_service_over_sasl_plain_with_credentials_from_the_environment(secure_broker, tmp_path):
    """(a) SASL_PLAINTEXT + PLAIN: user and password only in the environment."""
    topic, estimates, dead, log = _run_service_through(
        secure_broker, tmp_path, "plain", "SASL",
        'security_protocol = "SASL_PLAINTEXT"\nsasl_mechanism = "PLAIN"',
        {"CASECLOUD_KAFKA_USERNAME": "alice", "CASECLOUD_KAFKA_PASSWORD": ALICE_PASSWORD},
    )
    assert len(estimates) == DAYS
    assert {orjson.loads(r.value)["stream"] for r in estimates} == {STREAM}
    (letter,) = [orjson.loads(r.value) for r in dead]
    assert letter["reason"] == "oversized"  # max_message_bytes = 1024 holds over SASL too
    assert "partitions assigned" in log
    _assert_no_secret(log, "the service log")
    # An independent client (kcat/librdkafka) authenticating with SCRAM-SHA-256 reads the same estimates.
    via_kcat = _kcat_read(secure_broker.address("SASL"), f"{topic}.estimates", "SCRAM-SHA-256", "bob", BOB_PASSWORD)
    assert sorted(orjson.loads(r["payload"])["id"] for r in via_kcat) == sorted(orjson.loads(r.value)["id"] for r in estimates)


def test_service_over_sasl_ssl_scram_512_with_config_file_credentials(secure_broker, pki, tmp_path):
    """SASL_SSL + SCRAM-SHA-512; user, password and a relative ssl_cafile in the file."""
    shutil.copy(pki / "ca.pem", tmp_path / "kafka-ca.pem")  # resolved against the config file's directory
    _, estimates, dead, log = _run_service_through(
        secure_broker, tmp_path, "scram512tls", "SASLTLS",
        'security_protocol = "SASL_SSL"\nsasl_mechanism = "SCRAM-SHA-512"\n'
        f'sasl_username = "bob"\nsasl_password = "{BOB_PASSWORD}"\nssl_cafile = "kafka-ca.pem"',
        {},
    )
    assert len(estimates) == DAYS and len(dead) == 1
    _assert_no_secret(log, "the service log")


@pytest.mark.parametrize(
    "listener, settings",
    [
        ("SASL", {"security_protocol": "SASL_PLAINTEXT", "sasl_mechanism": "SCRAM-SHA-256", "sasl_username": "bob", "sasl_password": BOB_PASSWORD}),
        ("SASL", {"security_protocol": "SASL_PLAINTEXT", "sasl_mechanism": "SCRAM-SHA-512", "sasl_username": "bob", "sasl_password": BOB_PASSWORD}),
        ("TLS", {"security_protocol": "SSL", "ssl_cafile": "{pki}/ca.pem", "ssl_certfile": "{pki}/client.pem", "ssl_keyfile": "{pki}/client.key"}),
    ],
    ids=["scram-sha-256", "scram-sha-512", "mutual-tls"],
)
def test_transport_round_trip(secure_broker, pki, listener, settings):
    """The transport receives a record, publishes an output and commits, over each mechanism."""
    topic = f"secure.rt.{settings.get('sasl_mechanism', 'mtls').lower()}"
    secure_broker.create_topic(topic, 1)
    produce(secure_broker.bootstrap_servers, topic, [(b"k", b'{"hello": 1}')])
    s = KafkaSettings(
        bootstrap_servers=secure_broker.address(listener), group_id=f"rt-{topic}", input_topic=topic,
        estimates_topic=f"{topic}.estimates", session_timeout_ms=6000,
        **{k: v.format(pki=pki) for k, v in settings.items()},
    )

    async def scenario():
        transport = KafkaTransport(s)
        await transport.start()
        try:
            record = None
            for _ in range(60):
                record = await transport.receive(timeout=0.5)
                if record is not None:
                    break
            assert record is not None and record.value == b'{"hello": 1}'
            await transport.publish([OutRecord("estimates", b"k", b'{"answer": 2}', ())])
            await transport.commit(record)
        finally:
            await transport.stop()

    asyncio.run(asyncio.wait_for(scenario(), 120))
    (out,) = read_all(secure_broker.bootstrap_servers, f"{topic}.estimates")
    assert out.value == b'{"answer": 2}'


def test_wrong_password_stops_the_service_with_one_readable_line(secure_broker, tmp_path):
    """(b) the CLI exits non-zero with a one-line error naming the broker and the credentials."""
    topic = "secure.wrongpw"
    secure_broker.create_topic(topic, 1)
    address = secure_broker.address("SASL")
    config = _service_config(
        tmp_path / "wrong.toml", bootstrap=address, topic=topic, group="g-wrong", checkpoint_dir=tmp_path / "ckpt",
        kafka_extra='security_protocol = "SASL_PLAINTEXT"\nsasl_mechanism = "PLAIN"\nsasl_username = "alice"',
    )
    service = _Service(config, tmp_path / "wrong.log", {"CASECLOUD_KAFKA_PASSWORD": WRONG_PASSWORD})
    try:
        code = service.wait(90)
    finally:
        service.kill()
    log = service.log.read_text(errors="replace")
    assert code == 1, log
    errors = [line for line in log.splitlines() if line.startswith("casecloud: ")]
    assert len(errors) == 1, log
    (line,) = errors
    assert f"connect to {address}" in line and "credentials" in line
    assert "user 'alice'" in line and "PLAIN" in line and "SaslAuthenticationFailed" in line
    assert "Traceback" not in log
    _assert_no_secret(log, "the service log")


@pytest.mark.parametrize(
    "mechanism, user, password",
    [("PLAIN", "mallory", WRONG_PASSWORD), ("SCRAM-SHA-256", "bob", WRONG_PASSWORD), ("SCRAM-SHA-512", "nobody", WRONG_PASSWORD)],
    ids=["plain-unknown-user", "scram-sha-256-wrong-password", "scram-sha-512-unknown-user"],
)
def test_refused_credentials_raise_transport_auth_error(secure_broker, mechanism, user, password):
    s = KafkaSettings(
        bootstrap_servers=secure_broker.address("SASL"), input_topic="secure.auth", security_protocol="SASL_PLAINTEXT",
        sasl_mechanism=mechanism, sasl_username=user, sasl_password=password,
    )
    with pytest.raises(TransportAuthError) as info:
        asyncio.run(asyncio.wait_for(KafkaTransport(s).start(), 60))
    message = str(info.value)
    assert "refused our credentials" in message and secure_broker.address("SASL") in message
    assert f"user {user!r}" in message and mechanism in message
    _assert_no_secret(message + repr(info.value) + repr(s) + str(s) + s.model_dump_json(), "the error or the settings")


def test_sasl_client_on_a_plaintext_listener_is_told_so(secure_broker):
    s = KafkaSettings(
        bootstrap_servers=secure_broker.bootstrap_servers, input_topic="secure.auth", security_protocol="SASL_PLAINTEXT",
        sasl_mechanism="PLAIN", sasl_username="alice", sasl_password=ALICE_PASSWORD,
    )
    with pytest.raises(TransportAuthError, match="is the bootstrap address a SASL listener"):
        asyncio.run(asyncio.wait_for(KafkaTransport(s).start(), 60))


@pytest.mark.parametrize(
    "files, expected",
    [
        ({"ssl_cafile": "rogue-ca.pem", "ssl_certfile": "client.pem", "ssl_keyfile": "client.key"}, "TLS handshake failed.*CERTIFICATE_VERIFY_FAILED.*ssl_cafile"),
        ({"ssl_cafile": "ca.pem"}, "closed the connection.*client certificate.*ssl_certfile"),
        ({"ssl_cafile": "ca.pem", "ssl_certfile": "missing.pem"}, "ssl_certfile .*missing.pem.*cannot load"),
    ],
    ids=["untrusted-broker", "no-client-certificate", "unreadable-client-certificate"],
)
def test_tls_failures_are_explained(secure_broker, pki, files, expected):
    s = KafkaSettings(
        bootstrap_servers=secure_broker.address("TLS"), input_topic="secure.tls", security_protocol="SSL",
        **{k: pki / v for k, v in files.items()},
    )
    with pytest.raises((TransportError, ConfigError)) as info:
        asyncio.run(asyncio.wait_for(KafkaTransport(s).start(), 60))
    assert not isinstance(info.value, TransportAuthError)
    assert re.search(expected, str(info.value)), str(info.value)


def test_sasl_without_a_password_is_a_config_error(tmp_path):
    config = _service_config(
        tmp_path / "nopw.toml", bootstrap="127.0.0.1:9", topic="t", group="g", checkpoint_dir=tmp_path / "ckpt",
        kafka_extra='security_protocol = "SASL_SSL"\nsasl_mechanism = "SCRAM-SHA-512"\nsasl_username = "bob"',
    )
    with pytest.raises(SpecError, match=r"kafka: security_protocol SASL_SSL needs sasl_password \(or \$CASECLOUD_KAFKA_PASSWORD\)"):
        load_deployment_config(config, environ={})
    env = {k: v for k, v in os.environ.items() if not k.startswith("CASECLOUD_")}
    done = subprocess.run([sys.executable, "-m", "service.cli", "serve", "--config", str(config)],
                          capture_output=True, text=True, timeout=60, env=env)
    assert done.returncode == 2 and "CASECLOUD_KAFKA_PASSWORD" in done.stderr, done.stderr
    loaded = load_deployment_config(config, environ={"CASECLOUD_KAFKA_PASSWORD": BOB_PASSWORD})
    for text in (repr(loaded), str(loaded), loaded.model_dump_json(), repr(loaded.kafka)):
        _assert_no_secret(text, "the config's text forms")


# --------------------------------------------------------------------------- metrics endpoint address


def _listening_addresses(port: int) -> set[str]:
    """IPv4 addresses with a socket in LISTEN state on ``port`` (from /proc/net/tcp)."""
    out = set()
    for line in Path("/proc/net/tcp").read_text().splitlines()[1:]:
        fields = line.split()
        local, state = fields[1], fields[3]
        address, port_hex = local.split(":")
        if state == "0A" and int(port_hex, 16) == port:
            out.add(socket.inet_ntoa(bytes.fromhex(address)[::-1]))
    return out


def _reachable(host: str, port: int) -> bool:
    try:
        with socket.create_connection((host, port), timeout=2):
            return True
    except OSError:
        return False


@pytest.mark.parametrize("host, other, via_env", [("127.0.0.1", "127.0.0.2", False), ("127.0.0.2", "127.0.0.1", True)])
def test_metrics_listen_on_the_configured_address_only(tmp_path, host, other, via_env):
    """Bound to one loopback address, /metrics is not reachable through another
    (every 127.x address reaches this machine, so a wildcard bind would answer)."""
    (tmp_path / "obs.ndjson").write_text("")
    config = tmp_path / "file.toml"
    config.write_text(
        'transport = "file"\n[service]\ncheckpoint_dir = "ckpt"\n'
        f'[metrics]\nhost = "{"192.0.2.1" if via_env else host}"\nport = 0\n'
        '[file]\ninput = "obs.ndjson"\noutput_dir = "out"\n'
        '[[streams]]\nid = "s"\nmodel = "sir"\nstart = "2025-09-01"\nparticles = 50\n'
    )
    service = _Service(config, tmp_path / "metrics.log", {"CASECLOUD_METRICS_HOST": host} if via_env else {})
    try:
        match = wait_for(lambda: re.search(r"metrics on http://([\d.]+):(\d+)/metrics", service.log.read_text()),
                         60, "the metrics address in the log", service)
        assert match.group(1) == host
        port = int(match.group(2))
        assert _listening_addresses(port) == {host}
        with urllib.request.urlopen(f"http://{host}:{port}/healthz", timeout=5) as response:
            assert response.status == 200
        assert not _reachable(other, port), f"/metrics bound to {host} answered on {other}"
    finally:
        assert service.stop() == 0, service.log_tail()
