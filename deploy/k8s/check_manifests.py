#!/usr/bin/env python3
"""Check the Kubernetes manifests of deploy/k8s: every file parses as YAML, every object has
apiVersion, kind and metadata.name, and the objects agree with each other and with the
service:

- the Secret has exactly the token variables the site config needs (the names of
  service/src/config.rs: PLOTWEAVE_TOKEN_<SENSOR ID upper-cased, "-" and "." -> "_">,
  PLOTWEAVE_READ_TOKEN, PLOTWEAVE_ADMIN_TOKEN);
- Services select the StatefulSet's pods, the ServiceMonitor selects exactly one Service,
  the ports agree with server.listen of the ConfigMap's site.toml;
- probes use /healthz (liveness) and /readyz (readiness); resources have requests and limits;
- the kustomization lists every manifest but secret.yaml (placeholders, created out of band).

With PLOTWEAVE_BIN set to a plotweave binary, the ConfigMap's site.toml is also run through
`plotweave check`: with random tokens in the Secret's variables it must load, and with the
Secret's placeholders it must be refused, naming every variable.

Exit status 0 when all checks pass, 1 otherwise (each failure is printed).
"""

import os
import pathlib
import secrets
import subprocess
import sys
import tempfile
import tomllib

import yaml

HERE = pathlib.Path(__file__).resolve().parent
failures = []


def fail(msg):
    failures.append(msg)
    print(f"FAIL {msg}")


def token_var(sensor_id):
    """The environment variable of a sensor's token (service/src/config.rs, token_env_var)."""
    return "PLOTWEAVE_TOKEN_" + "".join(
        "_" if c in "-." else c.upper() for c in sensor_id
    )


def load_all():
    objects = {}
    for path in sorted(HERE.glob("*.yaml")):
        try:
            docs = [d for d in yaml.safe_load_all(path.read_text()) if d is not None]
        except yaml.YAMLError as e:
            fail(f"{path.name}: not valid YAML: {e}")
            continue
        for d in docs:
            if not isinstance(d, dict):
                fail(f"{path.name}: a document is not a mapping")
                continue
            missing = [k for k in ("apiVersion", "kind") if k not in d]
            if d.get("kind") != "Kustomization" and "name" not in d.get("metadata", {}):
                missing.append("metadata.name")
            if missing:
                fail(f"{path.name}: object lacks {', '.join(missing)}")
                continue
            name = d.get("metadata", {}).get("name", path.stem)
            objects.setdefault(d["kind"], {})[name] = (path.name, d)
    return objects


def one(objects, kind, name):
    got = objects.get(kind, {}).get(name)
    if got is None:
        fail(f"no {kind} named {name!r}")
        return None
    return got[1]


def plotweave_check(binary, site_toml, tokens):
    """`plotweave check` of `site_toml` with exactly `tokens` as PLOTWEAVE_* variables."""
    with tempfile.TemporaryDirectory() as d:
        cfg = pathlib.Path(d) / "site.toml"
        cfg.write_text(site_toml)
        env = {k: v for k, v in os.environ.items() if not k.startswith("PLOTWEAVE_")}
        env.update(tokens)
        return subprocess.run(
            [binary, "check", "--config", str(cfg)],
            env=env,
            capture_output=True,
            text=True,
            check=False,
        )


def selects(selector, labels):
    return all(labels.get(k) == v for k, v in selector.items())


def main():
    objects = load_all()
    cm = one(objects, "ConfigMap", "plotweave-site")
    secret = one(objects, "Secret", "plotweave-tokens")
    sts = one(objects, "StatefulSet", "plotweave")
    if not (cm and secret and sts):
        return
    site = tomllib.loads(cm["data"]["site.toml"])
    port = int(site["server"]["listen"].rsplit(":", 1)[1])
    if not site["server"]["listen"].startswith("0.0.0.0:"):
        fail("site.toml: server.listen must be 0.0.0.0:PORT to be reachable in the pod network")

    # Tokens: exactly the variables the configuration reads.
    need = {token_var(s["id"]) for s in site["sensor"]} | {
        "PLOTWEAVE_READ_TOKEN",
        "PLOTWEAVE_ADMIN_TOKEN",
    }
    have = set(secret.get("stringData", {})) | set(secret.get("data", {}))
    if need != have:
        fail(f"Secret keys {sorted(have)} differ from the variables needed {sorted(need)}")
    for s in site["sensor"]:
        if "token" in s:
            fail(f"site.toml: sensor {s['id']!r} has a token in the ConfigMap; use the Secret")

    pod = sts["spec"]["template"]
    pod_labels = pod["metadata"]["labels"]
    if not selects(sts["spec"]["selector"]["matchLabels"], pod_labels):
        fail("StatefulSet selector does not match its pod template labels")
    if sts["spec"].get("replicas") != 1:
        fail("StatefulSet must have exactly 1 replica (one picture per site)")
    if sts["spec"]["serviceName"] not in objects.get("Service", {}):
        fail(f"StatefulSet serviceName {sts['spec']['serviceName']!r} is not a Service")
    ann = pod["metadata"].get("annotations", {})
    if ann.get("prometheus.io/scrape") != "true" or ann.get("prometheus.io/port") != str(port):
        fail("pod annotations prometheus.io/scrape and prometheus.io/port are missing or wrong")
    (c,) = pod["spec"]["containers"]
    ports = {p["name"]: p["containerPort"] for p in c["ports"]}
    if ports.get("http") != port:
        fail(f"container port http {ports.get('http')} differs from server.listen port {port}")
    probes = {
        "livenessProbe": "/healthz",
        "readinessProbe": "/readyz",
        "startupProbe": "/healthz",
    }
    for probe, path in probes.items():
        got = c.get(probe, {}).get("httpGet", {}).get("path")
        if got != path:
            fail(f"{probe} path is {got!r}, expected {path!r}")
    res = c.get("resources", {})
    for part in ("requests", "limits"):
        for r in ("cpu", "memory"):
            if r not in res.get(part, {}):
                fail(f"container resources.{part}.{r} missing")
    if {e.get("secretRef", {}).get("name") for e in c.get("envFrom", [])} != {"plotweave-tokens"}:
        fail("container must take its environment from the Secret plotweave-tokens")
    sc = c.get("securityContext", {})
    if sc.get("allowPrivilegeEscalation") is not False or sc.get("readOnlyRootFilesystem") is not True:
        fail("container securityContext must forbid privilege escalation and write the root fs")
    if pod["spec"].get("securityContext", {}).get("runAsNonRoot") is not True:
        fail("pod must run as non-root")
    grace = pod["spec"].get("terminationGracePeriodSeconds", 30)
    if grace <= site["server"].get("shutdown_timeout", 10.0):
        fail("terminationGracePeriodSeconds must exceed server.shutdown_timeout")
    mounts = {m["name"]: m["mountPath"] for m in c.get("volumeMounts", [])}
    claims = {t["metadata"]["name"] for t in sts["spec"].get("volumeClaimTemplates", [])}
    if "recordings" not in claims or mounts.get("recordings") != "/var/lib/plotweave":
        fail("the recordings volume claim must be mounted at /var/lib/plotweave")

    services = objects.get("Service", {})
    for name, (_, svc) in services.items():
        if not selects(svc["spec"]["selector"], pod_labels):
            fail(f"Service {name} does not select the StatefulSet's pods")
        for p in svc["spec"]["ports"]:
            if p.get("targetPort") not in ("http", port):
                fail(f"Service {name} port {p.get('name')} targets {p.get('targetPort')!r}")
    for name, (_, sm) in objects.get("ServiceMonitor", {}).items():
        chosen = [
            n
            for n, (_, svc) in services.items()
            if selects(sm["spec"]["selector"]["matchLabels"], svc["metadata"].get("labels", {}))
        ]
        if len(chosen) != 1:
            fail(f"ServiceMonitor {name} selects Services {chosen}, expected exactly one")
        if [e.get("path") for e in sm["spec"]["endpoints"]] != ["/metrics"]:
            fail(f"ServiceMonitor {name} must scrape /metrics")

    kust = next(iter(objects.get("Kustomization", {}).values()), (None, None))[1]
    listed = set(kust["resources"]) if kust else set()
    files = {p.name for p in HERE.glob("*.yaml")} - {"kustomization.yaml"}
    # secret.yaml holds placeholders and is created out of band, never applied by kustomize.
    if listed != files - {"secret.yaml"}:
        fail(
            f"kustomization resources {sorted(listed)} differ from the manifests "
            f"{sorted(files - {'secret.yaml'})}"
        )

    binary = os.environ.get("PLOTWEAVE_BIN")
    if binary:
        placeholders = secret.get("stringData", {})
        # Random tokens for the same variables: the site must load with them...
        tokens = {k: secrets.token_urlsafe(24) for k in placeholders}
        r = plotweave_check(binary, cm["data"]["site.toml"], tokens)
        if r.returncode != 0:
            fail(f"plotweave check of the ConfigMap's site.toml failed:\n{r.stderr}")
        else:
            print("ok   plotweave check accepts the ConfigMap's site.toml with the Secret's variables")
        # ...and refuse the placeholders, naming every variable.
        r = plotweave_check(binary, cm["data"]["site.toml"], placeholders)
        unnamed = [k for k in placeholders if k not in r.stderr]
        if r.returncode != 2 or unnamed:
            fail(f"plotweave check must refuse the Secret's placeholders (exit 2, naming {unnamed}):\n{r.stderr}")
        else:
            print("ok   plotweave check refuses the Secret's placeholders, naming each variable")
    count = sum(len(v) for v in objects.values())
    print(f"{'ok  ' if not failures else 'FAIL'} {count} objects in {len(files) + 1} files checked")


if __name__ == "__main__":
    main()
    sys.exit(1 if failures else 0)
