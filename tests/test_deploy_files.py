"""Static checks of the deployment files in deploy/.

No container engine or Kubernetes cluster runs on the test machines, so the
Containerfile, compose file and Kubernetes manifests are not built or applied
here: they are parsed (PyYAML, tomllib) and checked against each other and
against the code they deploy (the config they carry loads with the service's
own config loader; ports, paths, probes, users and secrets line up).

The Prometheus files ARE executed with Prometheus's own tool: ``promtool check
rules``, ``promtool check config`` and ``promtool test rules`` (the rule unit
tests, each alert firing and not firing). promtool comes with Debian's
``prometheus`` package; the test fails (never skips) without it.
"""

from __future__ import annotations

import base64
import re
import shlex
import shutil
import subprocess
import tomllib
from pathlib import Path

import pytest
import yaml

from schemas import load_deployment_config
from service.runtime.metrics import STEP_BUCKETS, WRITE_BUCKETS, Metrics

REPO = Path(__file__).resolve().parents[1]
DEPLOY = REPO / "deploy"
PROM = DEPLOY / "prometheus"
RULES = PROM / "casecloud-rules.yml"
RULE_TESTS = [PROM / "casecloud-rules.test.yml", PROM / "casecloud-rules-days.test.yml"]
CONTAINERFILE = DEPLOY / "Containerfile"
COMPOSE = DEPLOY / "compose.yaml"
K8S = DEPLOY / "k8s"
RUNBOOK = DEPLOY / "RUNBOOK.md"

CHECKPOINT_VOLUME = "/var/lib/casecloud"
CONFIG_PATH = "/etc/casecloud/deploy.toml"


def promtool() -> str:
    path = shutil.which("promtool")
    if path is None:
        pytest.fail("promtool is not installed: run `apt-get install -y prometheus` (Debian; .ci/run does)")
    return path


def run_promtool(*args: str, cwd: Path = REPO) -> subprocess.CompletedProcess:
    return subprocess.run([promtool(), *args], capture_output=True, text=True, timeout=300, cwd=cwd)


def load_yaml_docs(path: Path) -> list[dict]:
    docs = [d for d in yaml.safe_load_all(path.read_text(encoding="utf-8")) if d is not None]
    assert docs, f"{path} holds no YAML document"
    return docs


# --------------------------------------------------------------------------- Prometheus


def test_promtool_check_rules():
    done = run_promtool("check", "rules", str(RULES))
    assert done.returncode == 0, done.stdout + done.stderr
    assert "SUCCESS" in done.stdout


def test_promtool_rule_unit_tests_pass():
    done = run_promtool("test", "rules", *map(str, RULE_TESTS))
    assert done.returncode == 0, done.stdout + done.stderr
    assert done.stdout.count("SUCCESS") == len(RULE_TESTS), done.stdout


def test_promtool_check_compose_prometheus_config():
    done = run_promtool("check", "config", str(PROM / "prometheus.yml"))
    assert done.returncode == 0, done.stdout + done.stderr
    assert "casecloud-rules.yml" in done.stdout  # the rules file is found next to the config


def _rules() -> list[dict]:
    return [rule for group in yaml.safe_load(RULES.read_text())["groups"] for rule in group["rules"]]


def _alerts() -> dict[str, dict]:
    return {r["alert"]: r for r in _rules() if "alert" in r}


def test_every_alert_is_unit_tested_firing_and_not_firing():
    firing: set[str] = set()
    quiet: set[str] = set()
    for path in RULE_TESTS:
        spec = yaml.safe_load(path.read_text())
        assert spec["rule_files"] == ["casecloud-rules.yml"]
        for case in spec["tests"]:
            for check in case.get("alert_rule_test", []):
                (firing if check.get("exp_alerts") else quiet).add(check["alertname"])
    alerts = set(_alerts())
    assert len(alerts) >= 8
    assert alerts - firing == set(), "alerts never tested firing"
    assert alerts - quiet == set(), "alerts never tested not firing"
    assert (firing | quiet) - alerts == set(), "tests name alerts the rules do not define"


def test_required_alerts_are_defined():
    exprs = {name: " ".join(rule["expr"].split()) for name, rule in _alerts().items()}
    joined = " ".join(exprs.values())
    for metric in (
        "casecloud_stream_update_age_seconds",
        "casecloud_effective_sample_size_ratio",
        "casecloud_collapses_total",
        "casecloud_messages_dead_lettered_total",
        "casecloud_consumer_lag_records",
        "casecloud_step_duration_seconds_bucket",
        "casecloud_checkpoint_failures_total",
        "casecloud_checkpoint_fallbacks_total",
        "casecloud_broker_reachable",
    ):
        assert metric in joined, f"no alert on {metric}"
    # what a stream is (daily, weekly) comes from labels the service sets, never from its id
    assert not re.search(r"stream\s*[=!]~", joined), "a rule matches stream ids by pattern"
    assert 'cadence="weekly"' in exprs["CasecloudWeeklyStreamStale"]
    assert "histogram_quantile(0.95" in exprs["CasecloudStepLatencyHigh"]
    assert "36 * 3600" in exprs["CasecloudStreamStale"]
    assert "< 0.05" in exprs["CasecloudEffectiveSampleSizeLow"]
    assert "(increase(casecloud_collapses_total[1h])) > 0" in exprs["CasecloudFilterCollapsed"]
    for name, rule in _alerts().items():
        assert rule["labels"]["severity"] in ("warning", "critical"), name
        assert {"summary", "description", "runbook_url"} <= set(rule["annotations"]), name
        assert "runbook" not in rule["annotations"], f"{name}: the common annotation key is runbook_url"


@pytest.mark.parametrize(
    "before, after",
    [
        ("> 36 * 3600", "> 48 * 3600"),  # a different staleness allowance
        (  # drop the clause that sees a counter born at its first increment
            "\n          or\n          sum by (stream) (max_over_time(casecloud_collapses_total[1h]) > 0 unless casecloud_collapses_total offset 1h)",
            "",
        ),
        ("casecloud_consumer_lag_records) > 100", "casecloud_consumer_lag_records) > 1000"),
        # weekly streams told by their id again, as before the cadence label
        ('casecloud_stream_update_age_seconds{cadence!="weekly"}', 'casecloud_stream_update_age_seconds{stream!~".*weekly.*"}'),
    ],
    ids=["stale-threshold", "collapse-new-series", "lag-threshold", "weekly-by-name"],
)
def test_rule_unit_tests_catch_a_changed_rule(tmp_path, before, after):
    """The unit tests are not vacuous: altering a rule makes them fail."""
    text = RULES.read_text()
    assert before in text
    (tmp_path / "casecloud-rules.yml").write_text(text.replace(before, after))
    shutil.copy(RULE_TESTS[0], tmp_path / RULE_TESTS[0].name)
    assert run_promtool("check", "rules", "casecloud-rules.yml", cwd=tmp_path).returncode == 0
    done = run_promtool("test", "rules", RULE_TESTS[0].name, cwd=tmp_path)
    assert done.returncode != 0, done.stdout
    assert "FAILED" in done.stdout + done.stderr


def _exported() -> dict[str, set[str]]:
    """Sample name -> label names, as the service's registry exports them once
    every metric has a child (counters, histograms and gauges touched once)."""
    m = Metrics(clock=lambda: 100.0)
    for metric in vars(m).values():
        names = getattr(metric, "_labelnames", None)
        if names is None:
            continue
        child = metric.labels(*["x"] * len(names)) if names else metric
        for action in ("inc", "observe", "set"):
            if hasattr(child, action):
                getattr(child, action)(1.0) if action != "inc" else child.inc()
                break
    m.mark_updated("x")
    m.watch_lag(lambda: {("topic", 0): 1})
    out: dict[str, set[str]] = {}
    for family in m.registry.collect():
        for sample in family.samples:
            out.setdefault(sample.name, set()).update(sample.labels)
    return out


def test_rules_use_only_metrics_and_labels_the_service_exports():
    """Rule unit tests use series written by hand; this ties the names and the
    labels in the rules to the service's real registry (service/runtime/metrics.py)."""
    exported = _exported()
    scrape_labels = {"instance", "job"}
    exported["up"] = set(scrape_labels)
    recorded = {r["record"] for r in _rules() if "record" in r}
    for rule in _rules():
        expr = rule["expr"]
        names = set(re.findall(r"(?<![:\w])(casecloud_[a-z0-9_]+|up)(?=\s*[{\[)\s])", expr + " "))
        names -= {n for n in names if n in recorded}
        unknown = {n for n in names if n not in exported}
        assert not unknown, f"rule {rule.get('alert') or rule.get('record')}: not exported by the service: {unknown}"
        available = set().union(*(exported[n] for n in names)) | scrape_labels
        used = set()
        for clause in re.findall(r"\b(?:by|on|without|ignoring)\s*\(([^)]*)\)", expr):
            used |= {label.strip() for label in clause.split(",") if label.strip()}
        used |= set(re.findall(r"\{\s*(\w+)\s*[=!]~?", expr))
        for text in (rule.get("annotations") or {}).values():
            used |= set(re.findall(r"\$labels\.(\w+)", text))
        assert used <= available, f"rule {rule.get('alert') or rule.get('record')}: labels {used - available} do not exist on {names}"


def test_every_alert_has_a_runbook_section():
    text = RUNBOOK.read_text(encoding="utf-8")
    anchors = {h.strip().lower() for h in re.findall(r"^#{2,4}\s+(\S+)\s*$", text, re.M)}
    for name, rule in _alerts().items():
        link = rule["annotations"]["runbook_url"]
        assert link.startswith("deploy/RUNBOOK.md#"), link
        assert link.split("#", 1)[1] in anchors, f"{name}: runbook anchor {link} has no heading in {RUNBOOK}"
        assert re.search(rf"\b{name}\b", text), f"{name} is not described in {RUNBOOK}"


# --------------------------------------------------------------------------- Containerfile


def _instructions(path: Path) -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) with line continuations joined and comments dropped."""
    out, current = [], ""
    for raw in path.read_text(encoding="utf-8").splitlines():
        line = raw.strip()
        if not current and (not line or line.startswith("#")):
            continue
        current += " " + line.rstrip("\\").strip() if current else line.rstrip("\\").strip()
        if not line.endswith("\\"):
            keyword, _, rest = current.partition(" ")
            out.append((keyword.upper(), rest.strip()))
            current = ""
    assert not current, f"{path} ends inside a continued line"
    return out


def _final_stage(instructions):
    starts = [i for i, (k, _) in enumerate(instructions) if k == "FROM"]
    return instructions[starts[-1]:]


def test_containerfile_base_user_volume_healthcheck_entrypoint():
    ins = _instructions(CONTAINERFILE)
    args = {k: v for k, v in ins if k == "ARG"}
    base = args["ARG"].split("=", 1)[1] if "ARG" in args else ""
    assert re.fullmatch(r"docker\.io/library/python:3\.1[1-9]-slim(-\w+)?", base), base
    requires = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]["requires-python"]
    assert requires == ">=3.11" and base.split(":")[1].startswith("3.1")
    final = _final_stage(ins)
    assert final[0] == ("FROM", "${PYTHON_IMAGE}")
    users = [v for k, v in final if k == "USER"]
    assert users, "the runtime stage sets no USER (it would run as root)"
    uid = users[-1].split(":")[0]
    assert uid.isdigit() and int(uid) >= 1000, f"USER {users[-1]}: use a numeric non-root uid"
    volumes = [v for k, v in final if k == "VOLUME"]
    assert any(CHECKPOINT_VOLUME in v for v in volumes), volumes
    env = " ".join(v for k, v in final if k == "ENV")
    assert f"CASECLOUD_CHECKPOINT_DIR={CHECKPOINT_VOLUME}/" in env  # state lands on the volume
    health = [v for k, v in final if k == "HEALTHCHECK"]
    assert len(health) == 1 and "/healthz" in health[0] and "urllib.request" in health[0] and '"python", "-c"' in health[0]
    port = re.search(r"CASECLOUD_METRICS_PORT=(\d+)", env).group(1)
    assert f"EXPOSE {port}" in [f"{k} {v}" for k, v in final]
    entry = [v for k, v in final if k == "ENTRYPOINT"]
    assert entry == ['["casecloud", "serve", "--config", "/etc/casecloud/deploy.toml"]']  # exec form: PID 1 gets SIGTERM
    assert ("STOPSIGNAL", "SIGTERM") in final


def test_containerfile_copies_everything_the_package_needs():
    ins = _instructions(CONTAINERFILE)
    copied = set()
    for k, v in ins:
        if k == "COPY" and not v.startswith("--from"):
            *sources, _dest = shlex.split(v)
            for s in sources:
                assert (REPO / s).exists(), f"COPY {s}: no such path in the repository (build context = repo root)"
                copied.add(s)
    project = tomllib.loads((REPO / "pyproject.toml").read_text())
    packages = project["tool"]["setuptools"].get("packages", [])
    if isinstance(packages, dict):  # [tool.setuptools.packages.find] include = ["filters", "filters.*", ...]
        packages = [p for p in packages["find"]["include"] if "*" not in p]
    assert packages, "pyproject.toml names no packages"
    needed = {"pyproject.toml", project["project"]["readme"], *packages}
    assert needed <= copied, f"not copied into the build stage: {needed - copied}"
    assert "casecloud" in project["project"]["scripts"]


# --------------------------------------------------------------------------- compose


def _compose() -> dict:
    (doc,) = load_yaml_docs(COMPOSE)
    return doc


def _load_embedded_config(tmp_path: Path, text: str, environ: dict[str, str]):
    path = tmp_path / "deploy.toml"
    path.write_text(text, encoding="utf-8")
    return load_deployment_config(path, environ=environ)


def _seconds(text: str) -> int:
    match = re.fullmatch(r"(?:(\d+)m)?(?:(\d+)s)?", str(text))
    assert match and any(match.groups()), f"unsupported duration {text!r}"
    return int(match.group(1) or 0) * 60 + int(match.group(2) or 0)


def _minimum_grace() -> float:
    """Longer than the slowest step plus the slowest checkpoint write that the
    service's histograms still resolve (their top finite buckets)."""
    return STEP_BUCKETS[-1] + WRITE_BUCKETS[-1]


def test_compose_services_and_embedded_config(tmp_path):
    compose = _compose()
    services = compose["services"]
    assert {"kafka", "casecloud", "prometheus"} <= set(services)

    kafka = services["kafka"]
    assert kafka["image"].startswith("docker.io/apache/kafka:3.")
    env = kafka["environment"]
    assert env["KAFKA_PROCESS_ROLES"] == "broker,controller"  # KRaft, single node
    assert not any("ZOOKEEPER" in k for k in env)
    assert len(base64.urlsafe_b64decode(env["CLUSTER_ID"] + "==")) == 16
    node = env["KAFKA_NODE_ID"]
    assert env["KAFKA_CONTROLLER_QUORUM_VOTERS"].startswith(f"{node}@kafka:")

    app = services["casecloud"]
    build = app["build"]
    assert (COMPOSE.parent / build["context"] / build["dockerfile"]).resolve() == CONTAINERFILE
    (mount,) = app["configs"]
    assert mount["target"] == CONFIG_PATH
    config = _load_embedded_config(tmp_path, compose["configs"][mount["source"]]["content"], environ={})
    assert config.transport == "kafka"
    assert config.kafka.bootstrap_servers in env["KAFKA_ADVERTISED_LISTENERS"]
    assert str(config.service.checkpoint_dir).startswith(CHECKPOINT_VOLUME)
    assert any(v.endswith(f":{CHECKPOINT_VOLUME}") for v in app["volumes"])
    assert f"127.0.0.1:{config.metrics.port}:{config.metrics.port}" in app["ports"]
    assert app["stop_signal"] == "SIGTERM"
    assert _seconds(app["stop_grace_period"]) > _minimum_grace()
    topics = services["kafka-topics"]["command"][0]
    for topic in (config.kafka.input_topic, config.kafka.estimates_topic, config.kafka.alerts_topic, config.kafka.dead_letter_topic):
        assert f"{topic}:" in topics

    prom = services["prometheus"]
    for volume in prom["volumes"]:
        source = volume.split(":")[0]
        if source.startswith("./"):
            assert (COMPOSE.parent / source).is_file(), volume
    assert all(p.startswith("127.0.0.1:") for s in services.values() for p in s.get("ports", []))
    scrape = yaml.safe_load((PROM / "prometheus.yml").read_text())
    (job,) = [j for j in scrape["scrape_configs"] if j["job_name"] == "casecloud"]
    assert job["static_configs"][0]["targets"] == [f"casecloud:{config.metrics.port}"]
    assert scrape["rule_files"] == [RULES.name]


# --------------------------------------------------------------------------- Kubernetes


def _k8s() -> dict[str, dict]:
    objects = {}
    for path in sorted(K8S.glob("*.yaml")):
        for doc in load_yaml_docs(path):
            assert {"apiVersion", "kind", "metadata"} <= set(doc), f"{path}: not a Kubernetes object"
            key = doc["kind"]
            assert key not in objects, f"two {key} objects"
            objects[key] = doc
    assert {"StatefulSet", "ConfigMap", "Secret", "Service"} <= set(objects)
    return objects


def _container(objects) -> dict:
    (container,) = objects["StatefulSet"]["spec"]["template"]["spec"]["containers"]
    return container


def _port_number(container: dict, port) -> int:
    if isinstance(port, int):
        return port
    (match,) = [p["containerPort"] for p in container["ports"] if p["name"] == port]
    return match


def test_statefulset_volume_per_replica_probes_and_grace(tmp_path):
    objects = _k8s()
    sts = objects["StatefulSet"]
    spec = sts["spec"]
    pod = spec["template"]["spec"]
    container = _container(objects)

    claims = {c["metadata"]["name"]: c for c in spec.get("volumeClaimTemplates", [])}
    assert claims, "no volumeClaimTemplates: replicas would share or lose state"
    mounts = {m["mountPath"]: m for m in container["volumeMounts"]}
    state = mounts[CHECKPOINT_VOLUME]
    assert state["name"] in claims and not state.get("readOnly", False)
    if spec["replicas"] > 1:
        # Partitions move between replicas; with one volume per replica a stream
        # would arrive where its checkpoints are not (README, "Scaling out").
        assert claims[state["name"]]["spec"]["accessModes"] == ["ReadWriteMany"], "scale out needs a shared checkpoint store"

    config = objects["ConfigMap"]
    toml_text = config["data"]["deploy.toml"]
    secret = objects["Secret"]
    secret_data = secret.get("stringData", {})
    loaded = _load_embedded_config(
        tmp_path,
        toml_text,
        environ={"CASECLOUD_KAFKA_USERNAME": secret_data["username"], "CASECLOUD_KAFKA_PASSWORD": secret_data["password"]},
    )
    port = loaded.metrics.port

    for probe, path in (("readinessProbe", "/readyz"), ("livenessProbe", "/healthz"), ("startupProbe", "/healthz")):
        get = container[probe]["httpGet"]
        assert get["path"] == path, probe
        assert _port_number(container, get["port"]) == port, probe
    assert pod["terminationGracePeriodSeconds"] > _minimum_grace()

    ctx = pod["securityContext"]
    assert ctx["runAsNonRoot"] is True and ctx["runAsUser"] != 0
    uid = [v for k, v in _instructions(CONTAINERFILE) if k == "USER"][-1].split(":")[0]
    assert ctx["runAsUser"] == int(uid) and ctx["fsGroup"] == int(uid)
    assert container["securityContext"]["allowPrivilegeEscalation"] is False
    assert "command" not in container, "keep the image's entrypoint (casecloud serve --config ...)"
    assert spec["serviceName"] == objects["Service"]["metadata"]["name"]


def test_config_comes_from_the_configmap_and_credentials_from_the_secret(tmp_path):
    objects = _k8s()
    pod = objects["StatefulSet"]["spec"]["template"]["spec"]
    container = _container(objects)
    volumes = {v["name"]: v for v in pod["volumes"]}
    mounts = {m["mountPath"]: m for m in container["volumeMounts"]}
    config_map = objects["ConfigMap"]

    mount = mounts[CONFIG_PATH]
    assert volumes[mount["name"]]["configMap"]["name"] == config_map["metadata"]["name"]
    assert mount["subPath"] in config_map["data"] and mount.get("readOnly") is True

    secret = objects["Secret"]
    keys = set(secret.get("stringData", {})) | set(secret.get("data", {}))
    env = {e["name"]: e for e in container["env"]}
    for var, key in (("CASECLOUD_KAFKA_USERNAME", "username"), ("CASECLOUD_KAFKA_PASSWORD", "password")):
        ref = env[var]["valueFrom"]["secretKeyRef"]
        assert ref == {"name": secret["metadata"]["name"], "key": key}
        assert key in keys

    text = config_map["data"]["deploy.toml"]
    assert "sasl_password" not in text and "sasl_username" not in text, "credentials belong in the Secret"
    with pytest.raises(Exception, match="CASECLOUD_KAFKA_PASSWORD"):
        _load_embedded_config(tmp_path, text, environ={"CASECLOUD_KAFKA_USERNAME": "u"})  # the Secret is required

    loaded = _load_embedded_config(
        tmp_path,
        text,
        environ={"CASECLOUD_KAFKA_USERNAME": "svc", "CASECLOUD_KAFKA_PASSWORD": "from-secret"},
    )
    assert loaded.kafka.security_protocol in ("SASL_SSL", "SASL_PLAINTEXT")
    assert loaded.kafka.sasl_password.get_secret_value() == "from-secret"
    assert str(loaded.service.checkpoint_dir).startswith(CHECKPOINT_VOLUME)
    # The CA file named in the config is mounted from the Secret.
    ca = loaded.kafka.ssl_cafile
    assert ca is not None
    (ca_mount,) = [m for path, m in mounts.items() if str(ca).startswith(path + "/")]
    items = volumes[ca_mount["name"]]["secret"]
    assert items["secretName"] == secret["metadata"]["name"]
    assert [i["path"] for i in items["items"]] == [ca.name] and items["items"][0]["key"] in keys
    # Env overrides in the pod agree with the file.
    assert env["CASECLOUD_METRICS_PORT"]["value"] == str(loaded.metrics.port)
    assert env["CASECLOUD_CHECKPOINT_DIR"]["value"] == str(loaded.service.checkpoint_dir)


def test_metrics_service_selects_the_pods():
    objects = _k8s()
    service = objects["Service"]["spec"]
    labels = objects["StatefulSet"]["spec"]["template"]["metadata"]["labels"]
    assert service["selector"].items() <= labels.items()
    assert objects["StatefulSet"]["spec"]["selector"]["matchLabels"].items() <= labels.items()
    assert service["clusterIP"] == "None"  # headless: the StatefulSet's governing service
    container = _container(objects)
    (port,) = service["ports"]
    assert port["name"] == "metrics"
    assert _port_number(container, port["targetPort"]) == port["port"]


# --------------------------------------------------------------------------- load script


def test_load_script_only_talks_to_loopback():
    import importlib.util

    spec = importlib.util.spec_from_file_location("casecloud_deploy_load", DEPLOY / "load.py")
    load = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(load)
    assert load._loopback_only("127.0.0.1:9092,127.0.0.2:9093") == "127.0.0.1:9092,127.0.0.2:9093"
    assert load._loopback_only("localhost:9092") == "localhost:9092"
    for remote in ("10.0.0.5:9092", "127.0.0.1:9092,192.168.1.4:9092", "203.0.113.9:9092"):
        with pytest.raises(SystemExit, match="only loopback"):
            load._loopback_only(remote)
