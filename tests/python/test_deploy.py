"""Offline checks of the deployment files in deploy/ (Kubernetes, Dockerfile, systemd, Grafana).

No cluster, registry or systemd instance is used. What is checked:

  * every Kubernetes manifest against the API schema of the official `kubernetes` Python
    client (requirements-deploy.txt): a strict walk over the typed models (every key must be a
    field of the model, primitive types must match, required fields must be present), plus a
    round trip through `ApiClient().deserialize` and `sanitize_for_serialization` that must give
    back the input unchanged (the client itself silently drops unknown keys);
  * the invariants that tie the files together: probes on the gRPC port, grace period vs
    drain time, security context, Service/PDB selectors, the headless Service, scrape
    annotations, the ConfigMap's TOML (parsed with tomllib, keys as `mtgauge serve --show-config` lists them), the
    mounted paths it names; the same config then runs in the real daemon (MTGAUGE_BIN);
  * the Dockerfile's build command is `cargo build --release --locked`, the release build CI runs;
  * the Grafana dashboard parses, every panel has a query, its PromQL parses (promtool);
  * the systemd unit: an INI parse with the hardening keys asserted always, and
    `systemd-analyze verify` / `security --offline` where systemd-analyze exists (else skipped,
    with the reason shown).

MTGAUGE_DEPLOY_DIR points the checks at another copy of deploy/ (used to try broken copies).
"""

import configparser
import functools
import json
import os
import re
import shlex
import shutil
import signal
import subprocess
import threading
import time
import tomllib
import urllib.request
from pathlib import Path

import pytest
import yaml
from kubernetes import client as k8s

from mtg_helpers import REPO, require_binary

DEPLOY = Path(os.environ.get("MTGAUGE_DEPLOY_DIR", REPO / "deploy")).resolve()
K8S_DIR = DEPLOY / "kubernetes"
DOCKERFILE = DEPLOY / "Dockerfile"
UNIT = DEPLOY / "systemd" / "mtgauge.service"
UNIT_TOML = DEPLOY / "systemd" / "mtgauge.toml"
DASHBOARD = DEPLOY / "grafana" / "mtgauge-dashboard.json"
CI_RUN = REPO / ".ci" / "run"

# Margin the grace period / stop timeout must leave after the drain (seconds).
MARGIN_S = 5
# Not part of the Kubernetes core API: checked by their own small schema below.
OPTIONAL_FILES = {"servicemonitor.yaml"}
REQUIRE_PROMTOOL = os.environ.get("MTGAUGE_REQUIRE_PROMTOOL") == "1"

MODELS = {
    ("v1", "ConfigMap"): "V1ConfigMap",
    ("v1", "Service"): "V1Service",
    ("v1", "ServiceAccount"): "V1ServiceAccount",
    ("apps/v1", "StatefulSet"): "V1StatefulSet",
    ("policy/v1", "PodDisruptionBudget"): "V1PodDisruptionBudget",
}


# ---------------------------------------------------------------------------------------------
# loading
# ---------------------------------------------------------------------------------------------

def load_docs(path: Path):
    with path.open(encoding="utf-8") as f:
        return [d for d in yaml.safe_load_all(f) if d is not None]


def kustomization():
    return load_docs(K8S_DIR / "kustomization.yaml")[0]


def resource_docs():
    """(file name, object) for every object of every file in the kustomization."""
    out = []
    for name in kustomization().get("resources", []):
        for doc in load_docs(K8S_DIR / name):
            out.append((name, doc))
    return out


def all_manifest_docs():
    out = []
    for path in sorted(K8S_DIR.glob("*.yaml")):
        if path.name == "kustomization.yaml":
            continue
        for doc in load_docs(path):
            out.append((path.name, doc))
    return out


def one(kind, docs=None):
    found = [d for _, d in (docs or resource_docs()) if d.get("kind") == kind]
    assert len(found) == 1, f"expected exactly one {kind} in the kustomization, found {len(found)}"
    return found[0]


def of_kind(kind):
    return [d for _, d in resource_docs() if d.get("kind") == kind]


def statefulset():
    return one("StatefulSet")


def pod_spec():
    return statefulset()["spec"]["template"]["spec"]


def container():
    cs = pod_spec()["containers"]
    assert len(cs) == 1, f"expected one container, found {[c.get('name') for c in cs]}"
    return cs[0]


def container_ports():
    return {p["name"]: p["containerPort"] for p in container().get("ports", []) if "name" in p}


def configmaps():
    return {d["metadata"]["name"]: d for d in of_kind("ConfigMap")}


def config_path_from_args():
    """The --config FILE the container's command line names."""
    argv = list(container().get("command", [])) + list(container().get("args", []))
    assert "--config" in argv, f"the container does not pass --config: {argv}"
    return argv[argv.index("--config") + 1]


def mounts():
    return container().get("volumeMounts", [])


def volumes():
    return {v["name"]: v for v in pod_spec().get("volumes", [])}


def config_toml_text():
    """The TOML text of the ConfigMap mounted at the --config path."""
    path = config_path_from_args()
    m = [m for m in mounts() if m["mountPath"] == path]
    assert m, f"--config {path} is not a mountPath of the container"
    m = m[0]
    assert m.get("subPath"), f"{path} is mounted without subPath (a directory, not the file)"
    vol = volumes()[m["name"]]
    assert "configMap" in vol, f"volume {m['name']} of --config is not a ConfigMap"
    cm = configmaps()[vol["configMap"]["name"]]
    assert m["subPath"] in cm.get("data", {}), f"ConfigMap {cm['metadata']['name']} has no key {m['subPath']}"
    return cm["data"][m["subPath"]]


def config_toml():
    return tomllib.loads(config_toml_text())


@functools.lru_cache(maxsize=None)
def shown_config(config_path=None, extra=()):
    """`mtgauge serve [--config FILE] --show-config`: the settings the daemon resolves (every
    default filled in), the config keys it accepts and the metric names it exports, asked of
    the binary under test rather than read from its source."""
    argv = [str(require_binary()), "serve", "--show-config"] + (["--config", str(config_path)] if config_path else []) + list(extra)
    p = subprocess.run(argv, capture_output=True, text=True, timeout=30)
    assert p.returncode == 0, f"{argv}: exit {p.returncode}: {p.stderr}"
    return json.loads(p.stdout)


def default_drain_seconds():
    return shown_config()["settings"]["drain_seconds"]


def drain_seconds(cfg):
    return cfg.get("drain_seconds", default_drain_seconds())


def default_data_dir():
    return shown_config()["settings"]["data_dir"]


def data_dir(cfg):
    """Where the config puts the durable store (None: durability none, memory only)."""
    if cfg.get("durability", "sync") == "none":
        return None
    return cfg.get("data_dir", default_data_dir())


# ---------------------------------------------------------------------------------------------
# strict schema walk over the kubernetes client's typed models
# ---------------------------------------------------------------------------------------------

def _json_fields(model):
    """json key -> (openapi type, required) for a model class of the kubernetes client."""
    out = {}
    fields = model.model_fields
    by_name = {}
    for fname, f in fields.items():
        by_name[fname] = f
        if f.alias:
            by_name[f.alias] = f
    for pyname, jkey in model.attribute_map.items():
        f = by_name.get(pyname)
        out[jkey] = (model.openapi_types[pyname], bool(f is not None and f.is_required()))
    return out


def strict_check(data, typ, path, errors):
    if typ.startswith("Optional["):
        typ = typ[len("Optional["):-1]
    if typ.startswith("List["):
        if not isinstance(data, list):
            errors.append(f"{path}: expected a list ({typ}), got {type(data).__name__}")
            return
        for i, item in enumerate(data):
            strict_check(item, typ[5:-1], f"{path}[{i}]", errors)
        return
    if typ.startswith("Dict["):
        if not isinstance(data, dict):
            errors.append(f"{path}: expected a map ({typ}), got {type(data).__name__}")
            return
        inner = typ[5:-1].split(", ", 1)[1]
        for k, v in data.items():
            if not isinstance(k, str):
                errors.append(f"{path}: map key {k!r} is not a string")
            strict_check(v, inner, f"{path}.{k}", errors)
        return
    prim = {"str": (str,), "int": (int,), "bool": (bool,), "float": (int, float), "datetime": (str,), "bytes": (str,)}
    if typ in prim:
        ok = isinstance(data, prim[typ]) and not (typ in ("int", "float") and isinstance(data, bool))
        if not ok:
            errors.append(f"{path}: expected {typ}, got {type(data).__name__} {data!r}")
        return
    if typ == "object":  # IntOrString, Quantity, raw extensions
        if not isinstance(data, (str, int, float, dict, list)) or isinstance(data, bool):
            errors.append(f"{path}: unexpected value {data!r}")
        return
    model = getattr(k8s, typ, None)
    if model is None:
        errors.append(f"{path}: the client has no model {typ}")
        return
    if not isinstance(data, dict):
        errors.append(f"{path}: expected an object ({typ}), got {type(data).__name__}")
        return
    fields = _json_fields(model)
    for key, value in data.items():
        if key not in fields:
            errors.append(f"{path}.{key}: unknown field of {typ} (known: {', '.join(sorted(fields))})")
            continue
        if value is None:
            continue
        strict_check(value, fields[key][0], f"{path}.{key}", errors)
    for key, (_, required) in fields.items():
        if required and key not in data:
            errors.append(f"{path}: required field {key} of {typ} is missing")


def _diff(a, b, path, out):
    if isinstance(a, dict) and isinstance(b, dict):
        for k in sorted(set(a) | set(b), key=str):
            if k not in b:
                out.append(f"{path}.{k}: dropped by the client model (unknown field?)")
            elif k not in a:
                out.append(f"{path}.{k}: added by the client model")
            else:
                _diff(a[k], b[k], f"{path}.{k}", out)
    elif isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        for i, (x, y) in enumerate(zip(a, b)):
            _diff(x, y, f"{path}[{i}]", out)
    elif a != b or type(a) is not type(b):
        out.append(f"{path}: {a!r} came back as {b!r}")


def validate_k8s_object(doc):
    """Errors of one object against the client's model of its kind (empty: valid)."""
    key = (doc.get("apiVersion"), doc.get("kind"))
    if key not in MODELS:
        return [f"no model for apiVersion/kind {key} (add it to MODELS if it is a core kind)"]
    model_name = MODELS[key]
    errors = []
    strict_check(doc, model_name, doc["kind"], errors)
    for req in ("apiVersion", "kind", "metadata"):
        if req not in doc:
            errors.append(f"{doc['kind']}: {req} missing")
    if not doc.get("metadata", {}).get("name"):
        errors.append(f"{doc['kind']}: metadata.name missing")
    api = k8s.ApiClient()
    try:
        obj = api.deserialize(json.dumps(doc), model_name, None)
    except Exception as e:  # pydantic's ValidationError and the client's own errors
        errors.append(f"deserialize into {model_name} failed: {e}")
        return errors
    back = api.sanitize_for_serialization(obj)
    _diff(doc, back, doc["kind"], errors)
    return errors


# The parts of the Prometheus Operator's ServiceMonitor (monitoring.coreos.com/v1) used here.
SERVICEMONITOR_SCHEMA = {
    "apiVersion": str, "kind": str,
    "metadata": {"name": str, "namespace": str, "labels": dict, "annotations": dict},
    "spec": {
        "selector": {"matchLabels": dict, "matchExpressions": list},
        "namespaceSelector": {"any": bool, "matchNames": list},
        "jobLabel": str, "targetLabels": list, "podTargetLabels": list, "sampleLimit": int,
        "endpoints": [{"port": str, "targetPort": (str, int), "path": str, "scheme": str,
                       "interval": str, "scrapeTimeout": str, "honorLabels": bool,
                       "honorTimestamps": bool, "relabelings": list, "metricRelabelings": list,
                       "params": dict}],
    },
}


def check_against(data, schema, path, errors):
    if isinstance(schema, dict):
        if not isinstance(data, dict):
            errors.append(f"{path}: expected a map")
            return
        for k, v in data.items():
            if k not in schema:
                errors.append(f"{path}.{k}: unknown field")
            else:
                check_against(v, schema[k], f"{path}.{k}", errors)
    elif isinstance(schema, list):
        if not isinstance(data, list):
            errors.append(f"{path}: expected a list")
            return
        for i, item in enumerate(data):
            check_against(item, schema[0], f"{path}[{i}]", errors)
    elif not isinstance(data, schema) or (schema is int and isinstance(data, bool)):
        errors.append(f"{path}: expected {schema}, got {data!r}")


# ---------------------------------------------------------------------------------------------
# the daemon's config keys (as `mtgauge serve --show-config` lists them)
# ---------------------------------------------------------------------------------------------

def known_config_keys():
    keys = shown_config()["keys"]
    return set(keys["top"]), set(keys["limits"]), set(keys["refset"])


def check_config_keys(cfg, where):
    top, limits, refset = known_config_keys()
    unknown = set(cfg) - top
    assert not unknown, f"{where}: unknown config keys {sorted(unknown)} (known: {sorted(top)})"
    assert set(cfg.get("limits", {})) <= limits, f"{where}: unknown [limits] keys {sorted(set(cfg['limits']) - limits)}"
    for r in cfg.get("refset", []):
        assert set(r) <= refset, f"{where}: unknown [[refset]] keys {sorted(set(r) - refset)}"
        assert "name" in r and "paths" in r, f"{where}: [[refset]] needs name and paths: {r}"
    for key in ("listen", "metrics_listen"):
        if key in cfg:
            assert re.fullmatch(r"(\d+\.\d+\.\d+\.\d+|\[[0-9a-fA-F:]+\]):\d+", cfg[key]), f"{where}: {key} = {cfg[key]!r} is not ADDR:PORT"
    if "log_format" in cfg:
        assert cfg["log_format"] in ("human", "json"), f"{where}: log_format {cfg['log_format']!r}"
    if "durability" in cfg:
        assert cfg["durability"] in ("sync", "none"), f"{where}: durability {cfg['durability']!r}"
    if "health_listen" in cfg:
        assert re.fullmatch(r"(\d+\.\d+\.\d+\.\d+|\[[0-9a-fA-F:]+\]):\d+", cfg["health_listen"]), f"{where}: health_listen"
    assert ("tls_cert" in cfg) == ("tls_key" in cfg), f"{where}: tls_cert and tls_key go together"


def port_of(addr):
    return int(addr.rsplit(":", 1)[1])


def host_of(addr):
    return addr.rsplit(":", 1)[0]


# ---------------------------------------------------------------------------------------------
# running the daemon with a config
# ---------------------------------------------------------------------------------------------

LISTEN_HUMAN = re.compile(r"listening grpc=(\S+) metrics=(\S+)")


def replica_args(ordinal=0):
    """The container's `serve` arguments after `--config FILE`, with each $(VAR) of an env
    variable set from the pod's metadata.name replaced by the name of pod `ordinal` (a
    StatefulSet's pods are NAME-ORDINAL)."""
    args = container()["args"]
    assert args[:2] == ["serve", "--config"], args
    names = {e["name"]: f"{statefulset()['metadata']['name']}-{ordinal}" for e in container().get("env", [])
             if e.get("valueFrom", {}).get("fieldRef", {}).get("fieldPath") == "metadata.name"}
    out = []
    for a in args[3:]:
        for var, value in names.items():
            a = a.replace(f"$({var})", value)
        assert "$(" not in a, f"unresolved variable in {a!r}"
        out.append(a)
    return out


def run_daemon_with_config(tmp_path, toml_text, drain, extra=()):
    """Start `mtgauge serve --config` (listeners moved to 127.0.0.1:0 by flags), wait for
    SERVING on gRPC health, GET /metrics, then SIGTERM: exit 0 within the drain time + margin."""
    binary = require_binary()
    from grpc_health.v1 import health_pb2, health_pb2_grpc
    import grpc

    cfg_file = tmp_path / "mtgauge.toml"
    cfg_file.write_text(toml_text, encoding="utf-8")
    store = data_dir(tomllib.loads(toml_text))
    # Never the machine's real /var/lib/mtgauge: the caller rewrote data_dir into tmp_path.
    assert store is None or Path(store).is_relative_to(tmp_path), f"data_dir {store} is outside the test's directory"
    argv = [str(binary), "serve", "--config", str(cfg_file), "--listen", "127.0.0.1:0", "--metrics-listen", "127.0.0.1:0", *extra]
    if "health_listen" in tomllib.loads(toml_text):
        argv += ["--health-listen", "127.0.0.1:0"]
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    lines, addrs, found = [], {}, threading.Event()

    def reader():
        for line in proc.stderr:
            lines.append(line)
            m = LISTEN_HUMAN.search(line)
            if m:
                addrs["grpc"], addrs["metrics"] = m.group(1), m.group(2)
                found.set()
            elif line.startswith("{"):
                try:
                    rec = json.loads(line)
                except ValueError:
                    continue
                f = rec.get("fields", {})
                if f.get("message") == "listening":
                    addrs["grpc"], addrs["metrics"] = f["grpc"], f["metrics"]
                    found.set()
        found.set()

    t = threading.Thread(target=reader, daemon=True)
    t.start()
    try:
        assert found.wait(30) and addrs, f"no listening line; exit {proc.poll()}; log:\n{''.join(lines)[-3000:]}"
        status = None
        with grpc.insecure_channel(addrs["grpc"]) as ch:
            stub = health_pb2_grpc.HealthStub(ch)
            deadline = time.monotonic() + 30
            while time.monotonic() < deadline:
                try:
                    # What the kubelet's grpc probe asks: the overall service "".
                    status = stub.Check(health_pb2.HealthCheckRequest(service=""), timeout=2).status
                    if status == health_pb2.HealthCheckResponse.SERVING:
                        break
                except grpc.RpcError:
                    pass
                time.sleep(0.2)
        assert status == health_pb2.HealthCheckResponse.SERVING, f"health not SERVING: {status}\n{''.join(lines)[-3000:]}"
        with urllib.request.urlopen(f"http://{addrs['metrics']}/metrics", timeout=10) as r:
            body = r.read().decode()
            assert r.status == 200
        assert "mtgauge_build_info" in body, body[:500]
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
        try:
            rc = proc.wait(timeout=drain + MARGIN_S)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
            pytest.fail(f"daemon did not exit within {drain + MARGIN_S} s of SIGTERM")
        t.join(5)
    assert rc == 0, f"daemon exited {rc} after SIGTERM:\n{''.join(lines)[-3000:]}"
    if store is not None:
        assert any(Path(store).iterdir()), f"the daemon wrote no store into data_dir {store}"
    return body, "".join(lines)


# =============================================================================================
# Kubernetes
# =============================================================================================

def _doc_id(item):
    name, doc = item
    return f"{name}:{doc.get('kind')}/{doc.get('metadata', {}).get('name')}"


CORE_DOCS = [d for d in all_manifest_docs() if d[0] not in OPTIONAL_FILES]


@pytest.mark.parametrize("item", CORE_DOCS, ids=[_doc_id(d) for d in CORE_DOCS])
def test_manifest_matches_api_schema(item):
    _, doc = item
    errors = validate_k8s_object(doc)
    assert not errors, "\n".join(errors)


def test_strict_checker_rejects_what_it_should():
    """The checker itself: an unknown key, a wrong type, a missing required field."""
    base = json.loads(json.dumps(statefulset()))
    assert not validate_k8s_object(base)
    bad = json.loads(json.dumps(base))
    bad["spec"]["template"]["spec"]["containers"][0]["livenessProbe"]["grpcc"] = {"port": 7410}
    assert any("grpcc" in e for e in validate_k8s_object(bad))
    bad = json.loads(json.dumps(base))
    bad["spec"]["template"]["spec"]["containers"][0]["ports"][0]["containerPort"] = "7410"
    assert any("containerPort" in e for e in validate_k8s_object(bad))
    bad = json.loads(json.dumps(base))
    del bad["spec"]["template"]["spec"]["containers"][0]["name"]
    assert any("required field name" in e for e in validate_k8s_object(bad))
    bad = json.loads(json.dumps(base))
    bad["spec"]["template"]["spec"]["containers"][0]["livenessProbe"]["grpc"]["port"] = "grpc"
    assert validate_k8s_object(bad), "a gRPC probe port must be a number"


def test_servicemonitor_shape():
    path = K8S_DIR / "servicemonitor.yaml"
    if not path.exists():
        pytest.skip("no servicemonitor.yaml")
    (doc,) = load_docs(path)
    assert (doc["apiVersion"], doc["kind"]) == ("monitoring.coreos.com/v1", "ServiceMonitor")
    errors = []
    check_against(doc, SERVICEMONITOR_SCHEMA, "ServiceMonitor", errors)
    assert not errors, "\n".join(errors)
    assert doc["spec"].get("endpoints"), "ServiceMonitor without endpoints"


def test_kustomization_lists_every_manifest():
    k = kustomization()
    assert k.get("apiVersion") == "kustomize.config.k8s.io/v1beta1" and k.get("kind") == "Kustomization"
    res = k.get("resources", [])
    assert len(res) == len(set(res)), f"duplicate resources: {res}"
    for r in res:
        assert (K8S_DIR / r).is_file(), f"kustomization lists missing file {r}"
        assert r not in OPTIONAL_FILES, f"{r} needs a CRD and must stay out of the default resources"
    files = {p.name for p in K8S_DIR.glob("*.yaml")} - {"kustomization.yaml"} - OPTIONAL_FILES
    assert files == set(res), f"manifests not in the kustomization: {sorted(files - set(res))}"
    for img in k.get("images", []):
        assert img["name"] == container()["image"].split(":")[0], f"images entry {img} matches no container image"


def test_kustomize_build_offline():
    kubectl = shutil.which("kubectl")
    if not kubectl:
        pytest.skip("kubectl not installed: `kubectl kustomize` not run (the files are still checked one by one)")
    p = subprocess.run([kubectl, "kustomize", str(K8S_DIR)], capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    built = [d for d in yaml.safe_load_all(p.stdout) if d]
    want = sorted((d["kind"], d["metadata"]["name"]) for _, d in resource_docs())
    assert sorted((d["kind"], d["metadata"]["name"]) for d in built) == want
    for doc in built:
        errors = validate_k8s_object(doc)
        assert not errors, f"{doc['kind']}/{doc['metadata']['name']} after kustomize:\n" + "\n".join(errors)


def test_probes_use_grpc_on_the_grpc_port():
    c = container()
    ports = container_ports()
    assert "grpc" in ports, f"the container exposes no port named grpc: {ports}"
    cfg = config_toml()
    assert port_of(cfg["listen"]) == ports["grpc"], "ConfigMap listen port != containerPort grpc"
    # Probes speak plaintext gRPC: on the main port, or on health_listen when the main port is TLS.
    probe_port = ports["grpc"]
    if "tls_cert" in cfg:
        assert "health_listen" in cfg, "TLS on the gRPC port: the kubelet's plaintext probes need health_listen"
        probe_port = port_of(cfg["health_listen"])
        assert probe_port in ports.values(), f"health_listen port {probe_port} is not a containerPort"
    for kind in ("livenessProbe", "readinessProbe", "startupProbe"):
        probe = c.get(kind)
        if kind == "startupProbe" and probe is None:
            continue
        assert probe, f"{kind} missing"
        assert set(probe) & {"grpc", "httpGet", "tcpSocket", "exec"} == {"grpc"}, f"{kind} must be a native gRPC probe: {probe}"
        assert probe["grpc"]["port"] == probe_port, f"{kind} port {probe['grpc']['port']} != {probe_port} (containerPort grpc {ports['grpc']})"
        # The daemon reports its status on the overall service "".
        assert probe["grpc"].get("service", "") == "", f"{kind} asks for service {probe['grpc']['service']!r}"


def prestop_seconds():
    pre = container().get("lifecycle", {}).get("preStop")
    if not pre:
        return 0
    if "sleep" in pre:
        return int(pre["sleep"]["seconds"])
    cmd = pre.get("exec", {}).get("command", [])
    if cmd and Path(cmd[0]).name == "sleep":
        return int(cmd[1])
    pytest.fail(f"preStop hook of unknown duration: {pre}")


def test_grace_period_covers_the_drain():
    drain = drain_seconds(config_toml())
    grace = pod_spec().get("terminationGracePeriodSeconds", 30)
    need = prestop_seconds() + drain + MARGIN_S
    assert grace >= need, f"terminationGracePeriodSeconds {grace} < preStop {prestop_seconds()} + drain {drain} + {MARGIN_S}"
    live = container()["livenessProbe"]
    window = live.get("periodSeconds", 10) * live.get("failureThreshold", 3)
    assert window > prestop_seconds() + drain, f"liveness failure window {window} s could kill a draining replica"


def test_security_context_hardening():
    pod, c = pod_spec(), container()
    psc, csc = pod.get("securityContext", {}), c.get("securityContext", {})
    merged = {**psc, **csc}
    assert merged.get("runAsNonRoot") is True, "runAsNonRoot must be true"
    assert isinstance(merged.get("runAsUser"), int) and merged["runAsUser"] > 0, "runAsUser must be a non-zero uid"
    for level, sc in (("pod", psc), ("container", csc)):
        # Where a level sets them, they must be hardened too (not only the effective value).
        assert sc.get("runAsNonRoot") in (None, True), f"{level} runAsNonRoot {sc.get('runAsNonRoot')}"
        assert sc.get("runAsUser") is None or sc["runAsUser"] > 0, f"{level} runAsUser {sc.get('runAsUser')}"
        assert sc.get("seccompProfile") is None or sc["seccompProfile"].get("type") == "RuntimeDefault", f"{level} seccompProfile {sc.get('seccompProfile')}"
    assert csc.get("allowPrivilegeEscalation") is False, "allowPrivilegeEscalation must be false"
    assert csc.get("readOnlyRootFilesystem") is True, "readOnlyRootFilesystem must be true"
    assert csc.get("privileged") in (None, False)
    caps = csc.get("capabilities", {})
    assert "ALL" in caps.get("drop", []), "capabilities must drop ALL"
    assert not caps.get("add"), f"capabilities added: {caps.get('add')}"
    seccomp = csc.get("seccompProfile") or psc.get("seccompProfile") or {}
    assert seccomp.get("type") == "RuntimeDefault", f"seccompProfile {seccomp}"
    assert pod.get("automountServiceAccountToken") is False, "the daemon needs no API token"
    # The uid is the image's USER (Dockerfile), so both agree on who owns /var/lib/mtgauge.
    user = dockerfile_runtime_user()
    assert user.split(":")[0] == str(merged["runAsUser"]), f"Dockerfile USER {user} != runAsUser {merged['runAsUser']}"


def test_resources_requests_and_limits():
    res = container().get("resources", {})
    for part in ("requests", "limits"):
        for r in ("cpu", "memory"):
            assert r in res.get(part, {}), f"resources.{part}.{r} missing"
    for r in ("cpu", "memory"):
        assert quantity(res["requests"][r]) <= quantity(res["limits"][r]), f"{r}: request above limit"


def quantity(q):
    q = str(q)
    units = {"m": 1e-3, "": 1, "k": 1e3, "M": 1e6, "G": 1e9, "T": 1e12, "Ki": 2**10, "Mi": 2**20, "Gi": 2**30, "Ti": 2**40}
    m = re.fullmatch(r"([0-9.]+)([A-Za-z]*)", q)
    assert m and m.group(2) in units, f"unparsed quantity {q}"
    return float(m.group(1)) * units[m.group(2)]


def selector_matches(selector, labels):
    return bool(selector) and all(labels.get(k) == v for k, v in selector.items())


def test_selectors_match_the_pods():
    sts = statefulset()
    labels = sts["spec"]["template"]["metadata"]["labels"]
    assert not sts["spec"]["selector"].get("matchExpressions")
    assert selector_matches(sts["spec"]["selector"]["matchLabels"], labels), "StatefulSet selector does not match its template"
    ports = container_ports()
    services = of_kind("Service")
    assert services
    for svc in services:
        name = svc["metadata"]["name"]
        assert selector_matches(svc["spec"].get("selector"), labels), f"Service {name} selects no mtgauge pod"
        for p in svc["spec"]["ports"]:
            tp = p.get("targetPort", p["port"])
            assert (tp in ports) if isinstance(tp, str) else (tp in ports.values()), f"Service {name} targetPort {tp} not exposed"
    (pdb,) = of_kind("PodDisruptionBudget")
    assert not pdb["spec"]["selector"].get("matchExpressions")
    assert selector_matches(pdb["spec"]["selector"]["matchLabels"], labels), "PDB selector does not match the pods"
    assert ("maxUnavailable" in pdb["spec"]) != ("minAvailable" in pdb["spec"]), "PDB needs one of maxUnavailable/minAvailable"


def test_services_grpc_metrics_headless():
    services = {s["metadata"]["name"]: s for s in of_kind("Service")}
    sts = statefulset()
    headless = services.get(sts["spec"].get("serviceName"))
    assert headless, f"no Service named serviceName {sts['spec'].get('serviceName')!r}; have {sorted(services)}"
    assert headless["spec"].get("clusterIP") == "None", "the StatefulSet's governing Service must be headless"
    ports = container_ports()
    grpc_svcs = [s for s in services.values() if s["spec"].get("type", "ClusterIP") == "ClusterIP"
                 and s["spec"].get("clusterIP") != "None"
                 and any(p.get("targetPort") in ("grpc", ports["grpc"]) for p in s["spec"]["ports"])]
    assert grpc_svcs, "no ClusterIP Service for gRPC"
    metrics_svcs = [s for s in services.values() if s is not headless
                    and any(p.get("targetPort") in ("metrics", ports["metrics"]) for p in s["spec"]["ports"])]
    assert metrics_svcs, "no Service for the metrics port"


def test_scrape_annotations_point_at_the_metrics_port():
    ann = statefulset()["spec"]["template"]["metadata"].get("annotations", {})
    ports = container_ports()
    cfg = config_toml()
    assert ann.get("prometheus.io/scrape") == "true", ann
    assert ann.get("prometheus.io/port") == str(ports["metrics"]), f"prometheus.io/port {ann.get('prometheus.io/port')} != metrics {ports['metrics']}"
    assert ann.get("prometheus.io/path", "/metrics") == "/metrics"
    assert port_of(cfg["metrics_listen"]) == ports["metrics"], "ConfigMap metrics_listen port != containerPort metrics"
    # Reachable from Prometheus: not loopback inside the pod.
    for key in ("listen", "metrics_listen"):
        assert host_of(cfg[key]) in ("0.0.0.0", "[::]"), f"{key} = {cfg[key]} is not reachable from outside the pod"
    # Each replica scraped once: no Service carries the scrape annotation too.
    for svc in of_kind("Service"):
        assert "prometheus.io/scrape" not in svc["metadata"].get("annotations", {}), f"Service {svc['metadata']['name']} would be scraped as well as the pods"


def test_servicemonitor_selects_exactly_the_metrics_service():
    path = K8S_DIR / "servicemonitor.yaml"
    if not path.exists():
        pytest.skip("no servicemonitor.yaml")
    (sm,) = load_docs(path)
    sel = sm["spec"]["selector"]["matchLabels"]
    picked = [s for s in of_kind("Service") if selector_matches(sel, s["metadata"].get("labels", {}))]
    assert len(picked) == 1, f"the ServiceMonitor selects {[s['metadata']['name'] for s in picked]}: each replica must be scraped once"
    names = {p.get("name"): p for p in picked[0]["spec"]["ports"]}
    for ep in sm["spec"]["endpoints"]:
        assert ep["port"] in names, f"endpoint port {ep['port']} not on Service {picked[0]['metadata']['name']}"
        assert names[ep["port"]].get("targetPort") in ("metrics", container_ports()["metrics"])
        assert ep.get("path", "/metrics") == "/metrics"


def test_configmap_toml_parses_with_known_keys():
    cfg = config_toml()
    check_config_keys(cfg, "ConfigMap TOML")


def test_configmap_toml_resolves_in_the_daemon(tmp_path):
    """The daemon itself reads the ConfigMap's TOML: every value it sets is what the daemon
    then runs with (`serve --config FILE --show-config`)."""
    f = tmp_path / "configmap.toml"
    f.write_text(config_toml_text())
    cfg, shown = config_toml(), shown_config(f, tuple(replica_args()))["settings"]
    for key in ("listen", "metrics_listen", "data_dir", "durability", "drain_seconds", "group_commit_ms", "log_format"):
        if key in cfg:
            assert shown[key] == cfg[key], f"{key}: the file says {cfg[key]!r}, the daemon resolves {shown[key]!r}"
    for k, v in cfg.get("limits", {}).items():
        assert shown["limits"][k] == v, f"limits.{k}: the file says {v}, the daemon resolves {shown['limits'][k]}"


def test_replicas_know_their_names_and_their_fleet(tmp_path):
    """Producer affinity in the manifests: each pod runs with --replica-name set from its own
    name (the downward API's metadata.name), and the ConfigMap's fleet names exactly the
    StatefulSet's pods, NAME-0 .. NAME-(replicas - 1); the daemon resolves both."""
    args = container()["args"]
    assert "--replica-name" in args, args
    var = args[args.index("--replica-name") + 1]
    m = re.fullmatch(r"\$\((\w+)\)", var)
    assert m, f"--replica-name {var!r} is not an env variable reference"
    env = {e["name"]: e for e in container().get("env", [])}
    assert env[m.group(1)]["valueFrom"]["fieldRef"]["fieldPath"] == "metadata.name", env[m.group(1)]
    sts = statefulset()
    pods = [f"{sts['metadata']['name']}-{i}" for i in range(sts["spec"]["replicas"])]
    assert config_toml()["fleet"] == pods, (config_toml().get("fleet"), pods)
    f = tmp_path / "configmap.toml"
    f.write_text(config_toml_text())
    for i, pod in enumerate(pods):
        shown = shown_config(f, tuple(replica_args(i)))["settings"]
        assert (shown["replica_name"], shown["fleet"]) == (pod, pods), shown


def mounted_under(path):
    """The volumeMount whose mountPath contains `path` (longest match)."""
    best = None
    for m in mounts():
        mp = m["mountPath"].rstrip("/")
        if path == mp or path.startswith(mp + "/"):
            if best is None or len(mp) > len(best["mountPath"]):
                best = m
    return best


def test_refset_dir_and_startup_refsets_are_mounted():
    cfg = config_toml()
    d = cfg.get("refset_dir")
    assert d, "the ConfigMap sets no refset_dir"
    m = mounted_under(d)
    assert m and m["mountPath"].rstrip("/") == d.rstrip("/"), f"refset_dir {d} is not a mountPath"
    assert m.get("readOnly") is True, f"the reference-set mount {d} must be read-only"
    assert not m.get("subPath"), "refset_dir must be a directory mount"
    vol = volumes()[m["name"]]
    for r in cfg.get("refset", []):
        for p in list(r["paths"]) + ([r["source"]] if r.get("source") else []):
            mm = mounted_under(p)
            assert mm, f"[[refset]] {r['name']}: {p} is on no mounted volume"
            v = volumes()[mm["name"]]
            if "configMap" in v:
                rel = p[len(mm["mountPath"].rstrip("/")) + 1:]
                data = configmaps()[v["configMap"]["name"]].get("data", {})
                assert rel in data, f"[[refset]] {r['name']}: {rel} is not a key of ConfigMap {v['configMap']['name']}"
    assert vol, "refset volume missing"


def test_data_volume_per_replica():
    sts = statefulset()
    vcts = sts["spec"].get("volumeClaimTemplates", [])
    assert vcts, "no volumeClaimTemplates: each replica needs its own data volume"
    mounted = {m["name"]: m["mountPath"] for m in mounts()}
    for v in vcts:
        assert v["metadata"]["name"] in mounted, f"claim template {v['metadata']['name']} is not mounted"
    assert "/var/lib/mtgauge" in mounted.values(), "/var/lib/mtgauge is not mounted"
    assert mounted_under("/var/lib/mtgauge")["name"] in {v["metadata"]["name"] for v in vcts}
    cfg = config_toml()
    store = data_dir(cfg)
    assert store, "the ConfigMap keeps no durable store (durability none): replicas would lose their state"
    assert "data_dir" in cfg, "set data_dir explicitly in the ConfigMap"
    m = mounted_under(store)
    assert m and m["name"] in {v["metadata"]["name"] for v in vcts}, f"data_dir {store} is not on the replica's own claim"
    assert not m.get("readOnly") and not m.get("subPath"), f"data_dir mount {m} must be a writable directory"


def test_every_mount_has_a_volume():
    names = set(volumes()) | {v["metadata"]["name"] for v in statefulset()["spec"].get("volumeClaimTemplates", [])}
    for m in mounts():
        assert m["name"] in names, f"volumeMount {m['name']} has no volume"


def test_configmap_config_runs_in_the_daemon(tmp_path):
    """The ConfigMap's TOML and the refsets ConfigMap's files, at temporary paths, in the real
    daemon: it must load the startup sets, report SERVING and drain on SIGTERM."""
    text = config_toml_text()
    cfg = tomllib.loads(text)
    d = cfg["refset_dir"]
    m = mounted_under(d)
    vol = volumes()[m["name"]]
    local = tmp_path / "refsets"
    local.mkdir()
    if "configMap" in vol:
        for k, v in configmaps()[vol["configMap"]["name"]].get("data", {}).items():
            (local / k).write_text(v, encoding="utf-8")
    text = text.replace(m["mountPath"].rstrip("/"), str(local))
    store = data_dir(cfg)
    if store is not None:
        # The data claim's mount, at a temporary path (the TOML must name data_dir itself, or
        # the daemon's default would be used: checked by test_data_volume_per_replica).
        text = text.replace(mounted_under(store)["mountPath"].rstrip("/"), str(tmp_path / "data"))
    body, log = run_daemon_with_config(tmp_path, text, drain_seconds(cfg), replica_args())
    for r in cfg.get("refset", []):
        assert f'refset="{r["name"]}"' in body, f"startup set {r['name']} not in /metrics"


# =============================================================================================
# Dockerfile
# =============================================================================================

def dockerfile_instructions():
    """(INSTRUCTION, text) with continuation lines joined; heredoc bodies kept with COPY."""
    lines = DOCKERFILE.read_text().splitlines()
    out, i = [], 0
    while i < len(lines):
        line = lines[i]
        i += 1
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        text = line
        while text.endswith("\\") and i < len(lines):
            nxt = lines[i]
            i += 1
            if nxt.lstrip().startswith("#"):
                continue
            text = text[:-1] + " " + nxt.strip()
        body = None
        h = re.search(r"<<-?'?\"?(\w+)'?\"?", text)
        if h:
            end = h.group(1)
            body = []
            while i < len(lines) and lines[i].strip() != end:
                body.append(lines[i])
                i += 1
            i += 1
            body = "\n".join(body) + "\n"
        instr, _, rest = text.strip().partition(" ")
        out.append((instr.upper(), rest.strip(), body))
    return out


def dockerfile_stages():
    stages = []
    for instr, rest, body in dockerfile_instructions():
        if instr == "FROM":
            stages.append([])
        stages[-1].append((instr, rest, body))
    return stages


def dockerfile_runtime_user():
    users = [rest for instr, rest, _ in dockerfile_stages()[-1] if instr == "USER"]
    assert users, "the runtime stage sets no USER"
    return users[-1]


def shell_commands(run_text):
    """Commands of a RUN line (mount flags stripped), split on && ; |."""
    text = re.sub(r"--mount=\S+\s*", "", run_text)
    return [c.strip() for c in re.split(r"&&|;|\|\|?", text) if c.strip()]


def test_dockerfile_build_command_is_the_ci_one():
    builds = [c for instr, rest, _ in dockerfile_instructions() if instr == "RUN"
              for c in shell_commands(rest) if c.startswith("cargo ")]
    cargo_build = [c for c in builds if shlex.split(c)[:2] == ["cargo", "build"]]
    assert cargo_build == ["cargo build --release --locked"], f"cargo build commands in the Dockerfile: {cargo_build}"
    # The same release build as CI: .ci/run must build with the same flags (in any order).
    ci = CI_RUN.read_text()
    ci_release = [shlex.split(l.strip()) for l in ci.splitlines()
                  if re.match(r"\s*cargo build\b", l) and "--release" in l]
    assert ci_release, f"{CI_RUN} has no release `cargo build`"
    assert any(sorted(c) == sorted(["cargo", "build", "--release", "--locked"]) for c in ci_release), \
        f"CI's release build differs from the Dockerfile's: {ci_release}"


def test_dockerfile_stages_and_runtime():
    stages = dockerfile_stages()
    assert len(stages) >= 2, "the Dockerfile must be multi-stage"
    build_from = stages[0][0][1]
    assert re.match(r"rust:", build_from), f"build stage FROM {build_from}"
    runtime_from = stages[-1][0][1]
    assert re.match(r"debian:\S*-slim\b", runtime_from), f"runtime FROM {runtime_from} is not Debian slim"
    user = dockerfile_runtime_user()
    uid = user.split(":")[0]
    assert uid.isdigit() and int(uid) > 0, f"runtime USER {user} must be a numeric non-root uid"
    entry = [rest for instr, rest, _ in stages[-1] if instr == "ENTRYPOINT"]
    assert entry, "no ENTRYPOINT"
    argv = json.loads(entry[-1])
    assert Path(argv[0]).name == "mtgauge" and argv[1] == "serve" and "--config" in argv, argv
    config = argv[argv.index("--config") + 1]
    # The image's default config (a heredoc) parses and has known keys only.
    heredocs = {rest.split()[-1]: body for instr, rest, body in stages[-1] if instr == "COPY" and body}
    assert config in heredocs, f"the image ships no {config}"
    cfg = tomllib.loads(heredocs[config])
    check_config_keys(cfg, "Dockerfile default config")
    for key in ("listen", "metrics_listen"):
        assert host_of(cfg[key]) in ("0.0.0.0", "[::]"), f"{key} must be reachable through published ports"
    # The store's directory exists in the image and belongs to the runtime user.
    store = data_dir(cfg)
    if store:
        runs = " ".join(rest for instr, rest, _ in stages[-1] if instr == "RUN")
        assert re.search(r"install -d -o " + uid + r" [^&]*" + re.escape(store), runs), f"data_dir {store} is not created for uid {uid}"
    # Kubernetes runs the same binary path and config path.
    kargv = list(container().get("command", [])) + list(container().get("args", []))
    assert kargv[:2] == [argv[0], "serve"], f"container command {kargv} != image entrypoint {argv}"


def dockerignore_allows(rel):
    """Tiny evaluator for the exclude-all-then-allow pattern of Dockerfile.dockerignore."""
    path = DEPLOY / "Dockerfile.dockerignore"
    if not path.exists():
        return True
    allowed = True
    for line in path.read_text().splitlines():
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        neg = line.startswith("!")
        pat = line[1:] if neg else line
        pat = pat.rstrip("/")
        if pat == "*" or rel == pat or rel.startswith(pat + "/"):
            allowed = neg
    return allowed


def test_dockerfile_context_files_exist_and_are_not_ignored():
    for instr, rest, body in dockerfile_instructions():
        if instr != "COPY" or body is not None or "--from=" in rest:
            continue
        parts = [p for p in shlex.split(rest) if not p.startswith("--")]
        for src in parts[:-1]:
            assert (REPO / src).exists(), f"COPY {src}: not in the repository"
            assert dockerignore_allows(src.rstrip("/")), f"COPY {src}: excluded by Dockerfile.dockerignore"


# =============================================================================================
# systemd
# =============================================================================================

def read_unit():
    cp = configparser.RawConfigParser(strict=False, interpolation=None, delimiters=("=",),
                                      comment_prefixes=("#", ";"), empty_lines_in_values=False)
    cp.optionxform = str
    values = {}
    section = None
    # configparser cannot keep repeated keys (SystemCallFilter twice): collect them by hand.
    for line in UNIT.read_text().splitlines():
        s = line.strip()
        if not s or s[0] in "#;":
            continue
        if s.startswith("[") and s.endswith("]"):
            section = s[1:-1]
            values.setdefault(section, {})
            continue
        assert section, f"key outside a section: {s}"
        assert "=" in s, f"not KEY=VALUE: {s}"
        k, v = s.split("=", 1)
        values[section].setdefault(k.strip(), []).append(v.strip())
    cp.read_string(UNIT.read_text())  # also a plain INI parse: fails on broken syntax
    return values


def unit_seconds(v):
    m = re.fullmatch(r"(\d+)\s*(s|sec|min|m)?", v)
    assert m, f"unparsed time span {v}"
    return int(m.group(1)) * (60 if m.group(2) in ("min", "m") else 1)


def test_systemd_unit_hardening_keys():
    u = read_unit()
    svc = u.get("Service", {})
    last = {k: v[-1] for k, v in svc.items()}
    want = {
        "ProtectSystem": "strict", "ProtectHome": "yes", "PrivateTmp": "yes", "NoNewPrivileges": "yes",
        "StateDirectory": "mtgauge", "KillSignal": "SIGTERM", "Restart": "on-failure",
        "SystemCallArchitectures": "native",
    }
    for k, v in want.items():
        assert last.get(k) == v, f"[Service] {k}={last.get(k)!r}, want {v!r}"
    assert last.get("DynamicUser") == "yes" or last.get("User") not in (None, "", "root", "0"), "needs DynamicUser=yes or a dedicated User="
    assert "CapabilityBoundingSet" in svc and svc["CapabilityBoundingSet"][-1] == "", "CapabilityBoundingSet= (empty) missing"
    assert "@system-service" in svc.get("SystemCallFilter", []), "SystemCallFilter=@system-service missing"
    fams = set(last.get("RestrictAddressFamilies", "").split())
    assert fams and fams <= {"AF_INET", "AF_INET6", "AF_UNIX"}, f"RestrictAddressFamilies={fams}"
    assert "ExecStart" in svc and "[Install]" not in svc
    argv = shlex.split(last["ExecStart"])
    assert argv[1] == "serve" and "--config" in argv, argv
    assert argv[argv.index("--config") + 1] == "/etc/mtgauge/mtgauge.toml"
    cfg = tomllib.loads(UNIT_TOML.read_text())
    store = data_dir(cfg)
    assert store == "/var/lib/" + last["StateDirectory"], f"data_dir {store} is not the StateDirectory (the only writable path)"
    drain = drain_seconds(cfg)
    assert unit_seconds(last.get("TimeoutStopSec", "90")) >= drain + MARGIN_S, f"TimeoutStopSec {last.get('TimeoutStopSec')} < drain {drain} + {MARGIN_S}"
    assert "WantedBy" in u.get("Install", {}), "[Install] WantedBy missing"


def systemd_analyze_unit(tmp_path):
    """A copy of the unit whose ExecStart names the binary under test (verify checks that the
    executable exists; /usr/local/bin/mtgauge is not installed here)."""
    binary = require_binary()
    text = UNIT.read_text()
    argv0 = re.search(r"^ExecStart=(\S+)", text, re.M).group(1)
    unit = tmp_path / "mtgauge.service"
    unit.write_text(text.replace(f"ExecStart={argv0}", f"ExecStart={binary}"))
    return unit


def test_systemd_analyze_verify(tmp_path):
    sa = shutil.which("systemd-analyze")
    if not sa:
        pytest.skip("systemd-analyze not installed: only the INI parse and key checks ran")
    unit = systemd_analyze_unit(tmp_path)
    p = subprocess.run([sa, "verify", "--man=no", str(unit)], capture_output=True, text=True, timeout=60)
    # verify exits 0 on unknown keys, with a warning: any output is a finding.
    assert p.returncode == 0 and not p.stdout.strip() and not p.stderr.strip(), f"rc={p.returncode}\n{p.stdout}\n{p.stderr}"


def test_systemd_analyze_security_exposure(tmp_path):
    sa = shutil.which("systemd-analyze")
    if not sa:
        pytest.skip("systemd-analyze not installed")
    unit = systemd_analyze_unit(tmp_path)
    # Exposure on systemd's 0-10 scale; --threshold is in tenths. 2.0 and below is "OK".
    p = subprocess.run([sa, "security", "--offline=true", "--threshold=20", "--no-pager", str(unit)],
                       capture_output=True, text=True, timeout=60)
    if "Unknown option" in p.stderr or "unrecognized option" in p.stderr:
        pytest.skip(f"this systemd-analyze has no offline security analysis: {p.stderr.strip()}")
    assert p.returncode == 0, f"exposure above 2.0:\n{p.stdout[-2000:]}\n{p.stderr}"


def test_systemd_example_config(tmp_path):
    text = UNIT_TOML.read_text()
    cfg = tomllib.loads(text)
    check_config_keys(cfg, str(UNIT_TOML))
    assert cfg.get("refset_dir", "").startswith("/etc/mtgauge/"), "refset_dir outside /etc/mtgauge (unreadable under ProtectSystem)"
    local = tmp_path / "refsets"
    local.mkdir()
    text = text.replace(cfg["refset_dir"], str(local))
    if data_dir(cfg):
        text = text.replace(data_dir(cfg), str(tmp_path / "data"))
    run_daemon_with_config(tmp_path, text, drain_seconds(cfg))


# =============================================================================================
# Grafana
# =============================================================================================

BUILTIN_VARS = {"__rate_interval", "__interval", "__range", "__interval_ms", "__range_s", "__all"}
# Recorded series of deploy/prometheus/mtgauge-rules.yml the dashboard reads.
RECORDED = ("session:mtgauge_bleu:sum", "session:mtgauge_bleu:increase15m",
            "session_metric:mtgauge_chrf:sum", "session_metric:mtgauge_chrf:increase15m")


def dashboard():
    return json.loads(DASHBOARD.read_text())


def panels(d):
    for p in d.get("panels", []):
        yield p
        yield from p.get("panels", [])  # collapsed rows


def dashboard_vars(d):
    return {v["name"]: v for v in d.get("templating", {}).get("list", [])}


def expand(expr, variables):
    """The PromQL a Grafana query becomes: constants substituted, the rest given sample values."""
    def sub(m):
        name = m.group(1) or m.group(2)
        if name == "__rate_interval" or name == "__interval" or name == "__range":
            return "5m"
        v = variables.get(name)
        assert v is not None, f"query uses undefined variable ${name}: {expr}"
        if v["type"] == "constant":
            return v["query"]
        return ".+"
    return re.sub(r"\$\{(\w+)(?::\w+)?\}|\$(\w+)", sub, expr)


def test_dashboard_parses_and_every_panel_has_a_query():
    d = dashboard()
    assert d.get("title") and d.get("uid")
    ps = [p for p in panels(d) if p.get("type") != "row"]
    assert ps, "no panels"
    ids = [p["id"] for p in ps]
    assert len(ids) == len(set(ids)), f"duplicate panel ids {ids}"
    variables = dashboard_vars(d)
    for p in ps:
        targets = p.get("targets", [])
        assert targets and all(t.get("expr", "").strip() for t in targets), f"panel {p.get('title')!r} has no query"
        refs = [t["refId"] for t in targets]
        assert len(refs) == len(set(refs)), f"panel {p['title']}: duplicate refIds"
        for t in targets:
            expand(t["expr"], variables)  # every variable defined
        assert "gridPos" in p


def test_dashboard_panels_cover_the_brief():
    d = dashboard()
    exprs = {p["title"]: " ".join(t["expr"] for t in p["targets"]) for p in panels(d) if p.get("type") != "row"}
    variables = dashboard_vars(d)
    full = {k: expand(v, variables) for k, v in exprs.items()}
    assert any("session:mtgauge_bleu:" in e for e in full.values()), "no fleet BLEU panel"
    assert any("session_metric:mtgauge_chrf:" in e and 'metric="chrf"' in e for e in full.values()), "no fleet chrF panel"
    assert any(re.search(r"rate\(mtgauge_segments_total", e) and "outcome" in e for e in full.values()), "no segments/s by outcome"
    assert any("histogram_quantile" in e and "mtgauge_batch_seconds_bucket" in e for e in full.values()), "no batch latency quantiles"
    # The guards' flag rate: flagged over decided (checked minus undecided), per session and guard.
    assert any("mtgauge_guard_flagged_total" in e and "mtgauge_guard_checked_total" in e
               and "mtgauge_guard_undecided_total" in e and "by (session, guard)" in e for e in full.values()), "no guard flag-rate panel"
    for p in panels(d):
        if any(r in expand(" ".join(t["expr"] for t in p.get("targets", [])), variables) for r in RECORDED):
            steps = p["fieldConfig"]["defaults"]["thresholds"]["steps"]
            assert len(steps) >= 2, f"score panel {p['title']!r} has no thresholds"


def test_dashboard_recorded_series_named_in_one_place():
    d = dashboard()
    text = DASHBOARD.read_text()
    variables = dashboard_vars(d)
    consts = {v["query"]: k for k, v in variables.items() if v["type"] == "constant"}
    for name in RECORDED:
        assert name in consts, f"{name} is not a constant variable"
        assert text.count(f'"{name}"') == 1, f"{name} appears {text.count(name)} times in the JSON; keep it in its constant only"
    for p in panels(d):
        for t in p.get("targets", []):
            assert not re.search(r"\w+:\w+:\w+", t["expr"]), f"panel {p['title']!r} names a recorded series directly: {t['expr']}"
    rules = DEPLOY / "prometheus" / "mtgauge-rules.yml"
    if rules.exists():
        missing = [n for n in RECORDED if n not in rules.read_text()]
        if missing:
            import warnings
            warnings.warn(f"recorded series used by the dashboard but not (yet) in {rules}: {missing}")


def test_dashboard_raw_metrics_exist():
    exported = set(shown_config()["metrics"])
    assert "mtgauge_segments_total" in exported, f"serve --show-config lists no metrics: {exported}"
    d = dashboard()
    variables = dashboard_vars(d)
    exprs = [t["expr"] for p in panels(d) for t in p.get("targets", [])]
    exprs += [v.get("definition", "") for v in variables.values() if v["type"] == "query"]
    for e in exprs:
        for name in re.findall(r"(?<![\w:])(mtgauge_\w+)", e):
            base = re.sub(r"_(bucket|sum|count)$", "", name)
            assert name in exported or base in exported, f"dashboard uses {name}, which the daemon does not export"


def test_dashboard_promql_parses(tmp_path):
    promtool = shutil.which("promtool")
    if not promtool:
        if REQUIRE_PROMTOOL:
            pytest.fail("MTGAUGE_REQUIRE_PROMTOOL=1 but promtool is not installed")
        pytest.skip("promtool not installed: dashboard PromQL not parsed")
    d = dashboard()
    variables = dashboard_vars(d)
    rules = []
    for p in panels(d):
        for t in p.get("targets", []):
            rules.append({"record": f"dashboard_check:panel{p['id']}:{t['refId']}", "expr": expand(t["expr"], variables)})
    f = tmp_path / "dashboard-exprs.yml"
    f.write_text(yaml.safe_dump({"groups": [{"name": "dashboard", "rules": rules}]}))
    p = subprocess.run([promtool, "check", "rules", str(f)], capture_output=True, text=True, timeout=60)
    assert p.returncode == 0, p.stdout + p.stderr


# =============================================================================================
# README
# =============================================================================================

def test_readme_mentions_the_caveats():
    text = (DEPLOY / "README.md").read_text().lower()
    for needle in ("proxy", "tokenizer", "average of averages", "terminationgraceperiodseconds", "replica"):
        assert needle in text, f"deploy/README.md does not mention {needle!r}"
