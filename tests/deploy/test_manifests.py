"""deploy/: the container recipe, gunicorn settings, Kubernetes manifests and the
operations guide, checked against the code they deploy.

References: the Kubernetes API reference for apps/v1 Deployment, v1 Service,
autoscaling/v2 HorizontalPodAutoscaler, policy/v1 PodDisruptionBudget, v1
ConfigMap/Secret/PersistentVolumeClaim (field names and shapes encoded in the
JSON Schemas below, written from that reference, from memory, validated with
the ``jsonschema`` library); the Dockerfile reference for instruction syntax
(FROM ... AS, USER, HEALTHCHECK, EXPOSE); gunicorn's settings list
(``gunicorn.config.Config().settings``); the live Flask ``url_map`` of
``demur.serve.web.app.create_app`` for every route a probe or health check names.
"""

from __future__ import annotations

import re
import runpy
import shlex
import tomllib
from dataclasses import fields
from pathlib import Path
from typing import Any

import jsonschema
import pytest
import yaml

from demur.serve.web.auth import TokenSet
from demur.serve.config import ServeConfig, build_config

ROOT = Path(__file__).resolve().parents[2]
DEPLOY = ROOT / "deploy"
K8S = DEPLOY / "k8s"
CONFIG_FIELDS = {f.name for f in fields(ServeConfig)}

# -- JSON Schemas (basic structure per kind) -------------------------------------------------
_META = {
    "type": "object",
    "required": ["name", "labels"],
    "properties": {"name": {"type": "string", "pattern": "^[a-z0-9]([-a-z0-9]*[a-z0-9])?$"},
                   "labels": {"type": "object", "additionalProperties": {"type": "string"}}},
}
_BASE = {
    "type": "object",
    "required": ["apiVersion", "kind", "metadata"],
    "properties": {"apiVersion": {"type": "string"}, "kind": {"type": "string"}, "metadata": _META},
}
_PROBE = {
    "type": "object",
    "required": ["httpGet"],
    "properties": {"httpGet": {"type": "object", "required": ["path", "port"],
                               "properties": {"path": {"type": "string", "pattern": "^/"},
                                              "port": {"type": ["string", "integer"]}}},
                   "periodSeconds": {"type": "integer", "minimum": 1},
                   "failureThreshold": {"type": "integer", "minimum": 1}},
}
_QUANTITY = {"type": "string", "pattern": r"^[0-9.]+(m|Mi|Gi|Ki)?$"}
_CONTAINER = {
    "type": "object",
    "required": ["name", "image", "ports", "livenessProbe", "readinessProbe", "resources"],
    "properties": {
        "ports": {"type": "array", "minItems": 1,
                  "items": {"type": "object", "required": ["containerPort"],
                            "properties": {"containerPort": {"type": "integer", "minimum": 1, "maximum": 65535},
                                           "name": {"type": "string"}}}},
        "livenessProbe": _PROBE,
        "readinessProbe": _PROBE,
        "resources": {"type": "object", "required": ["requests", "limits"],
                      "properties": {k: {"type": "object", "required": ["cpu", "memory"],
                                         "properties": {"cpu": _QUANTITY, "memory": _QUANTITY}}
                                     for k in ("requests", "limits")}},
        "env": {"type": "array", "items": {"type": "object", "required": ["name"]}},
        "envFrom": {"type": "array"},
        "volumeMounts": {"type": "array", "items": {"type": "object", "required": ["name", "mountPath"]}},
    },
}
SCHEMAS: dict[str, dict[str, Any]] = {
    "Deployment": {
        "properties": {"apiVersion": {"const": "apps/v1"}, "spec": {
            "type": "object", "required": ["replicas", "selector", "template"],
            "properties": {
                "replicas": {"type": "integer", "minimum": 2},
                "selector": {"type": "object", "required": ["matchLabels"]},
                "template": {"type": "object", "required": ["metadata", "spec"], "properties": {
                    "spec": {"type": "object", "required": ["containers", "volumes"], "properties": {
                        "containers": {"type": "array", "minItems": 1, "items": _CONTAINER},
                        "volumes": {"type": "array", "items": {"type": "object", "required": ["name"]}},
                    }}}}}}},
        "required": ["spec"],
    },
    "Service": {"properties": {"apiVersion": {"const": "v1"}, "spec": {
        "type": "object", "required": ["selector", "ports"],
        "properties": {"ports": {"type": "array", "minItems": 1,
                                 "items": {"type": "object", "required": ["port", "targetPort"]}}}}},
                "required": ["spec"]},
    "HorizontalPodAutoscaler": {"properties": {"apiVersion": {"const": "autoscaling/v2"}, "spec": {
        "type": "object", "required": ["scaleTargetRef", "minReplicas", "maxReplicas", "metrics"],
        "properties": {"minReplicas": {"type": "integer", "minimum": 2},
                       "maxReplicas": {"type": "integer"},
                       "scaleTargetRef": {"type": "object", "required": ["apiVersion", "kind", "name"]}}}},
                                "required": ["spec"]},
    "PodDisruptionBudget": {"properties": {"apiVersion": {"const": "policy/v1"}, "spec": {
        "type": "object", "required": ["selector"],
        "oneOf": [{"required": ["minAvailable"]}, {"required": ["maxUnavailable"]}]}},
                            "required": ["spec"]},
    "ConfigMap": {"properties": {"apiVersion": {"const": "v1"},
                                 "data": {"type": "object", "additionalProperties": {"type": "string"}}},
                  "required": ["data"]},
    "Secret": {"properties": {"apiVersion": {"const": "v1"},
                              "stringData": {"type": "object", "additionalProperties": {"type": "string"}}},
               "required": ["stringData"]},
    "PersistentVolumeClaim": {"properties": {"apiVersion": {"const": "v1"}, "spec": {
        "type": "object", "required": ["accessModes", "resources"]}}, "required": ["spec"]},
}


def _docs() -> list[tuple[str, dict[str, Any]]]:
    out = []
    for path in sorted(K8S.glob("*.yaml")):
        for doc in yaml.safe_load_all(path.read_text()):
            if doc is not None:
                out.append((path.name, doc))
    return out


def _one(kind: str) -> dict[str, Any]:
    found = [d for _, d in _docs() if d["kind"] == kind]
    assert len(found) == 1, f"expected one {kind}, found {len(found)}"
    return found[0]


def _container() -> dict[str, Any]:
    return _one("Deployment")["spec"]["template"]["spec"]["containers"][0]


@pytest.fixture(scope="module")
def app(tiny_bundle_factory: Any) -> Any:
    from demur.serve.web.app import create_app

    return create_app(ServeConfig(bundle=str(tiny_bundle_factory().path)))


def _get_routes(app: Any) -> set[str]:
    return {rule.rule for rule in app.url_map.iter_rules() if "GET" in (rule.methods or set())}


# -- Kubernetes ------------------------------------------------------------------------------
def test_every_manifest_parses_and_has_the_shape_of_its_kind() -> None:
    """jsonschema (Draft 2020-12) against the basic structure of each kind (Kubernetes API reference)."""
    docs = _docs()
    assert docs, "no manifests in deploy/k8s"
    for name, doc in docs:
        jsonschema.validate(doc, _BASE, cls=jsonschema.Draft202012Validator)
        assert doc["kind"] in SCHEMAS, f"{name}: unexpected kind {doc['kind']}"
        jsonschema.validate(doc, SCHEMAS[doc["kind"]], cls=jsonschema.Draft202012Validator)
    kinds = sorted(d["kind"] for _, d in docs)
    assert kinds == sorted(SCHEMAS), kinds


def test_schemas_catch_a_broken_manifest() -> None:
    """The schema check is not vacuous: a Deployment without probes or with one replica fails."""
    deployment = _one("Deployment")
    broken = yaml.safe_load(yaml.safe_dump(deployment))
    del broken["spec"]["template"]["spec"]["containers"][0]["readinessProbe"]
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(broken, SCHEMAS["Deployment"])
    broken = yaml.safe_load(yaml.safe_dump(deployment))
    broken["spec"]["replicas"] = 1
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(broken, SCHEMAS["Deployment"])


def test_probes_point_at_real_routes_of_the_app(app: Any) -> None:
    routes = _get_routes(app)
    c = _container()
    for probe in ("livenessProbe", "readinessProbe", "startupProbe"):
        if probe in c:
            assert c[probe]["httpGet"]["path"] in routes, f"{probe} path is not a GET route of the app"
    assert c["livenessProbe"]["httpGet"]["path"] == "/healthz"
    assert c["readinessProbe"]["httpGet"]["path"] == "/readyz"
    client = app.test_client()
    assert client.get("/healthz").status_code == 200
    assert client.get("/readyz").status_code == 200
    annotations = _one("Deployment")["spec"]["template"]["metadata"].get("annotations", {})
    if "prometheus.io/path" in annotations:
        assert annotations["prometheus.io/path"] in routes | {"/metrics"}


def test_ports_agree_everywhere() -> None:
    configmap = _one("ConfigMap")["data"]
    c = _container()
    named = {p.get("name"): p["containerPort"] for p in c["ports"]}
    port = int(configmap["DEMUR_PORT"])
    assert named["http"] == port == ServeConfig().port
    for probe in ("livenessProbe", "readinessProbe"):
        assert c[probe]["httpGet"]["port"] in ("http", port)
    svc = _one("Service")["spec"]["ports"][0]
    assert svc["targetPort"] in ("http", port)
    assert int(_one("Deployment")["spec"]["template"]["metadata"]["annotations"]["prometheus.io/port"]) == port
    assert f"EXPOSE {port}" in (DEPLOY / "Containerfile").read_text()


def _demur_names() -> dict[str, str]:
    names: dict[str, str] = {}
    names.update({k: "configmap" for k in _one("ConfigMap")["data"]})
    names.update({k: "secret" for k in _one("Secret")["stringData"] if k.startswith("DEMUR_")})
    names.update({e["name"]: "deployment env" for e in _container().get("env", [])})
    return names


def test_env_names_are_serve_config_fields() -> None:
    """DEMUR_ + upper-case field name (serve/config.py ENV_PREFIX)."""
    for name, where in _demur_names().items():
        assert name.startswith("DEMUR_"), f"{where}: {name} lacks the DEMUR_ prefix"
        assert name[len("DEMUR_"):].lower() in CONFIG_FIELDS, f"{where}: {name} is no ServeConfig field"


def test_configmap_values_build_a_valid_config() -> None:
    env = dict(_one("ConfigMap")["data"])
    env["DEMUR_REVIEW_STORE"] = _one("Secret")["stringData"]["DEMUR_REVIEW_STORE"]
    cfg = build_config(env=env)
    assert cfg.review_store_url.startswith("postgresql://"), "replicas must share a PostgreSQL review store"
    assert cfg.host == "0.0.0.0"
    # sizing: one worker per CPU of the limit, one onnxruntime thread each
    limits_cpu = float(_container()["resources"]["limits"]["cpu"])
    assert cfg.workers * cfg.ort_intra_threads <= limits_cpu
    # paths the pod writes or reads must be on mounted volumes (the root file system is read-only)
    mounts = {m["mountPath"]: m for m in _container()["volumeMounts"]}
    assert Path(cfg.bundle).parent.as_posix() in mounts and cfg.bundles_dir in mounts
    assert mounts[cfg.bundles_dir].get("readOnly") is True
    assert cfg.data_dir in mounts
    assert any(cfg.token_file.startswith(p + "/") for p in mounts)
    assert any(cfg.metrics_multiprocess_dir.startswith(p + "/") for p in mounts)


def test_secret_holds_placeholders_and_a_parsable_token_file(tmp_path: Path) -> None:
    secret = _one("Secret")["stringData"]
    assert all("REPLACE-ME" in v for v in secret.values()), "the Secret must carry placeholders only"
    token_file = tmp_path / "tokens"
    token_file.write_text(secret["tokens"])
    tokens = TokenSet.from_config(ServeConfig(token_file=str(token_file)))
    for scope in ("predict", "review", "admin"):
        assert tokens.configured(scope)
    vol = next(v for v in _one("Deployment")["spec"]["template"]["spec"]["volumes"] if v["name"] == "tokens")
    assert vol["secret"]["secretName"] == _one("Secret")["metadata"]["name"]
    refs = [e["valueFrom"]["secretKeyRef"] for e in _container()["env"] if "valueFrom" in e]
    assert all(r["name"] == _one("Secret")["metadata"]["name"] and r["key"] in secret for r in refs)


def test_selectors_and_references_match() -> None:
    dep = _one("Deployment")
    labels = dep["spec"]["template"]["metadata"]["labels"]
    match = dep["spec"]["selector"]["matchLabels"]
    assert match.items() <= labels.items()
    assert _one("Service")["spec"]["selector"].items() <= labels.items()
    assert _one("PodDisruptionBudget")["spec"]["selector"]["matchLabels"].items() <= labels.items()
    target = _one("HorizontalPodAutoscaler")["spec"]["scaleTargetRef"]
    assert (target["kind"], target["name"]) == ("Deployment", dep["metadata"]["name"])
    assert _one("HorizontalPodAutoscaler")["spec"]["minReplicas"] >= 2
    cm = [s["configMapRef"]["name"] for s in _container()["envFrom"] if "configMapRef" in s]
    assert cm == [_one("ConfigMap")["metadata"]["name"]]
    pvc = next(v for v in dep["spec"]["template"]["spec"]["volumes"] if v["name"] == "bundles")
    assert pvc["persistentVolumeClaim"]["claimName"] == _one("PersistentVolumeClaim")["metadata"]["name"]
    pdb = _one("PodDisruptionBudget")["spec"]
    assert pdb.get("maxUnavailable", 0) < dep["spec"]["replicas"]


def test_pod_runs_unprivileged() -> None:
    pod = _one("Deployment")["spec"]["template"]["spec"]
    assert pod["securityContext"]["runAsNonRoot"] is True and pod["securityContext"]["runAsUser"] != 0
    sc = _container()["securityContext"]
    assert sc["readOnlyRootFilesystem"] is True and sc["allowPrivilegeEscalation"] is False
    assert sc["capabilities"]["drop"] == ["ALL"]


# -- the container recipe ------------------------------------------------------------------
def _stages() -> list[dict[str, Any]]:
    """Split the recipe into stages of (instruction, argument) pairs; continuation lines joined."""
    text = (DEPLOY / "Containerfile").read_text()
    text = re.sub(r"\\\n", " ", text)
    stages: list[dict[str, Any]] = []
    for line in text.splitlines():
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        word, _, rest = line.partition(" ")
        word = word.upper()
        if word == "FROM":
            m = re.match(r"(\S+)(?:\s+AS\s+(\S+))?", rest, re.IGNORECASE)
            assert m, line
            stages.append({"image": m.group(1), "name": m.group(2), "ins": []})
        elif stages:
            stages[-1]["ins"].append((word, rest.strip()))
    return stages


def test_containerfile_is_multi_stage_and_the_runtime_has_no_torch() -> None:
    stages = _stages()
    assert len(stages) >= 2
    builder, runtime = stages[0], stages[-1]
    build_text = " ".join(a for _, a in builder["ins"])
    assert "[serve]" in build_text and "[export]" not in build_text and "[all]" not in build_text
    assert "torch" not in " ".join(a for w, a in runtime["ins"] if w != "LABEL").lower()
    assert any(w == "COPY" and f"--from={builder['name']}" in a for w, a in runtime["ins"])
    # the serve extra itself pulls no torch (pyproject.toml)
    extras = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["optional-dependencies"]
    assert not any(req.lower().startswith("torch") for req in extras["serve"])


def test_containerfile_runtime_user_is_not_root() -> None:
    users = [a for w, a in _stages()[-1]["ins"] if w == "USER"]
    assert users, "the runtime stage sets no USER"
    user = users[-1].split(":")[0]
    assert user not in ("root", "0")
    pod_uid = _one("Deployment")["spec"]["template"]["spec"]["securityContext"]["runAsUser"]
    assert user == str(pod_uid)


def test_containerfile_healthcheck_hits_a_real_route(app: Any) -> None:
    checks = [a for w, a in _stages()[-1]["ins"] if w == "HEALTHCHECK"]
    assert len(checks) == 1
    paths = re.findall(r"https?://[^/'\"]+(/[A-Za-z0-9_./-]*)", checks[0])
    assert paths and all(p in _get_routes(app) for p in paths)
    assert "/healthz" in paths


def test_containerfile_env_and_volumes() -> None:
    runtime = _stages()[-1]
    env_names = []
    for word, arg in runtime["ins"]:
        if word == "ENV":
            env_names += [tok.split("=", 1)[0] for tok in shlex.split(arg) if "=" in tok]
    for name in env_names:
        if name.startswith("DEMUR_"):
            assert name[6:].lower() in CONFIG_FIELDS, name
    volumes = " ".join(a for w, a in runtime["ins"] if w == "VOLUME")
    assert "/bundles" in volumes
    env = {tok.split("=", 1)[0]: tok.split("=", 1)[1]
           for w, a in runtime["ins"] if w == "ENV" for tok in shlex.split(a) if "=" in tok}
    assert int(env["DEMUR_PORT"]) == ServeConfig().port
    build_config(env={k: v for k, v in env.items() if k.startswith("DEMUR_")})


# -- gunicorn settings ------------------------------------------------------------------------
def test_gunicorn_conf_matches_demur_serve(monkeypatch: pytest.MonkeyPatch) -> None:
    """Both ways of starting the server give the same settings (demur.serve.web.server.gunicorn_options)."""
    from gunicorn.config import Config

    from demur.serve.web.server import gunicorn_options

    for key in [k for k in list(__import__("os").environ) if k.startswith("DEMUR_")]:
        monkeypatch.delenv(key)
    monkeypatch.setenv("DEMUR_WORKERS", "2")
    conf = runpy.run_path(str(DEPLOY / "gunicorn.conf.py"))
    known = set(Config().settings)
    public = {k: v for k, v in conf.items() if not k.startswith("_") and k not in ("annotations", "os")
              and not callable(v) and not isinstance(v, type(re))}
    unknown = set(public) - known - {"build_config", "gunicorn_options"}
    assert not unknown, f"not gunicorn settings: {unknown}"
    expected = gunicorn_options(build_config(env={"DEMUR_WORKERS": "2", "DEMUR_THREADS": "4"}))
    for key, value in expected.items():
        got = conf[key]
        assert (got == [value] if key == "bind" else got == value), key
    assert conf["workers"] == 2 and conf["threads"] == 4
    assert conf["preload_app"] is False and conf["worker_class"] == "demur.serve.web.loop.worker.FrontWorker"
    assert conf["graceful_timeout"] > 0 and conf["timeout"] >= 30
    for hook in ("when_ready", "on_starting", "child_exit"):
        assert callable(conf[hook]) and hook in known


def test_access_log_never_holds_headers_or_query_strings() -> None:
    """gunicorn's access-log atoms: %({name}i)s is a request header, %(q)s the query string,
    %(r)s the request line with it (gunicorn settings reference, access_log_format)."""
    conf = runpy.run_path(str(DEPLOY / "gunicorn.conf.py"))
    fmt = conf["access_log_format"]
    assert not re.search(r"%\(\{[^}]*\}i\)", fmt), "a request header is logged"
    assert "%(q)s" not in fmt and "%(r)s" not in fmt and "%(a)s" not in fmt


# -- the operations guide -----------------------------------------------------------------------
def test_guide_explains_every_alert() -> None:
    guide = (DEPLOY / "README.md").read_text()
    alerts = []
    for path in sorted((DEPLOY / "prometheus" / "rules").glob("*.yml")):
        for group in (yaml.safe_load(path.read_text()) or {}).get("groups", []):
            alerts += [r["alert"] for r in group.get("rules", []) if "alert" in r]
    assert alerts, "no alert rules found in deploy/prometheus/rules"
    for name in alerts:
        assert f"`{name}`" in guide, f"deploy/README.md does not explain alert {name}"
    for topic in ("## Sizing", "## Scaling out with PostgreSQL", "## Rolling out a new bundle", "## Alerts"):
        assert topic in guide
    assert "never replaces" in guide  # the plain caution


def test_gunicorn_conf_serves_the_app(tiny_bundle_factory: Any, tmp_path: Path) -> None:
    """``gunicorn -c deploy/gunicorn.conf.py`` with only DEMUR_* settings serves the app on 127.0.0.1."""
    import importlib
    import os
    import socket
    import subprocess
    import sys
    import time
    import urllib.request

    conf = runpy.run_path(str(DEPLOY / "gunicorn.conf.py"))
    module, _, call = conf["wsgi_app"].partition(":")
    assert callable(getattr(importlib.import_module(module), call.removesuffix("()")))
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    env = {k: v for k, v in os.environ.items() if not k.startswith("DEMUR_")}
    env.update({"DEMUR_BUNDLE": str(tiny_bundle_factory().path), "DEMUR_PORT": str(port),
                "DEMUR_HOST": "127.0.0.1", "DEMUR_WORKERS": "1", "DEMUR_DATA_DIR": str(tmp_path / "data")})
    log = open(tmp_path / "gunicorn.log", "wb")
    proc = subprocess.Popen([str(Path(sys.executable).with_name("gunicorn")), "-c", str(DEPLOY / "gunicorn.conf.py")],
                            cwd=ROOT, env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    try:
        deadline, status = time.monotonic() + 60, None
        while time.monotonic() < deadline and proc.poll() is None:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/readyz", timeout=2) as r:
                    status = r.status
                    break
            except OSError:
                time.sleep(0.2)
        assert status == 200, (tmp_path / "gunicorn.log").read_text()[-2000:]
    finally:
        proc.terminate()
        try:
            proc.wait(30)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(10)
        log.close()
