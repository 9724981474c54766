#!/usr/bin/env python3
"""Static checks of the deployment files (called by deploy/check.sh).

Parses deploy/compose.yaml, deploy/k8s/*.yaml, deploy/Dockerfile, the example
configuration, the Grafana dashboard and the alert rules, and checks that they
agree with each other and with the telemetry spec (docs/telemetry.md):
every metric, label and label value they use must be listed there.

    python3 deploy/check_deploy.py [--repo DIR] [--promtool PATH] [--bin PATH]

Prints one line per check and a closing "static checks: N ok, N failed" line;
exits 1 if any check failed.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys
import tempfile
import tomllib
from pathlib import Path

import yaml

RESULTS: list[tuple[bool, str]] = []


def check(ok: bool, what: str, detail: str = "") -> bool:
    RESULTS.append((bool(ok), what))
    if ok:
        print(f"  ok   {what}")
    else:
        print(f"  FAIL {what}" + (f": {detail}" if detail else ""))
    return bool(ok)


# ------------------------------------------------------------------ telemetry

TARGET_LABELS = {"job", "instance", "namespace", "pod"}


class Metric:
    def __init__(self, name: str):
        self.name = name
        self.type = ""
        self.labels: dict[str, set[str] | None] = {}  # None: values not enumerated
        self.exported = True


def parse_telemetry(path: Path) -> dict[str, Metric]:
    """Reads the '### `name`' sections of docs/telemetry.md."""
    metrics: dict[str, Metric] = {}
    cur: Metric | None = None
    exported = True
    in_labels = False
    for line in path.read_text().splitlines():
        if line.startswith("## "):
            exported = "Prometheus adds" not in line
            cur = None
            continue
        m = re.match(r"^### `([a-zA-Z_:][a-zA-Z0-9_:]*)`\s*$", line)
        if m:
            cur = Metric(m.group(1))
            cur.exported = exported
            metrics[cur.name] = cur
            in_labels = False
            continue
        if cur is None:
            continue
        m = re.match(r"^- type: (\w+)", line)
        if m:
            cur.type = m.group(1)
            in_labels = False
            continue
        m = re.match(r"^- labels:\s*(.*)$", line)
        if m:
            rest = m.group(1).strip()
            in_labels = rest == ""
            for lab in re.findall(r"`([a-z_]+)`", rest):
                cur.labels[lab] = None
            continue
        m = re.match(r"^  - `([a-z_]+)`: (.*)$", line)
        if m and in_labels:
            values = m.group(2).strip()
            if re.fullmatch(r"`[^`]+`(, `[^`]+`)*", values):
                cur.labels[m.group(1)] = set(re.findall(r"`([^`]+)`", values))
            else:
                cur.labels[m.group(1)] = None
            continue
        if line.startswith("- "):
            in_labels = False
    return metrics


def check_telemetry_rules(metrics: dict[str, Metric], text: str) -> None:
    bad = []
    for m in metrics.values():
        if not m.exported:
            continue
        if not m.name.startswith("apportion_"):
            bad.append(f"{m.name}: not in the apportion_ namespace")
        if m.type not in ("counter", "gauge", "histogram"):
            bad.append(f"{m.name}: type {m.type!r}")
        if m.type == "counter" and not m.name.endswith("_total"):
            bad.append(f"{m.name}: counter without _total")
        if m.type != "counter" and m.name.endswith("_total"):
            bad.append(f"{m.name}: _total on a {m.type}")
        if m.type == "histogram" and not m.name.endswith("_seconds"):
            bad.append(f"{m.name}: histogram not in seconds")
        for lab in m.labels:
            if lab in {"user_id", "user_key", "event_id", "conversion_id", "campaign", "channel"}:
                bad.append(f"{m.name}: unbounded label {lab}")
    check(not bad, "telemetry spec: names follow the rules (namespace, _total, _seconds, bounded labels)", "; ".join(bad))
    table = set(re.findall(r"^\| `(apportion_[a-z0-9_]+)` \|", text, re.M))
    exported = {m.name for m in metrics.values() if m.exported}
    check(table == exported, "telemetry spec: summary table lists the same metrics as the sections",
          f"only in table: {sorted(table - exported)}, only in sections: {sorted(exported - table)}")


# --------------------------------------------------------------------- PromQL

PROMQL_KEYWORDS = {"and", "or", "unless", "by", "without", "on", "ignoring", "group_left",
                   "group_right", "offset", "bool", "inf", "nan", "atan2", "start", "end"}


def strip_grafana(expr: str) -> str:
    expr = expr.replace("$__rate_interval", "5m").replace("$__interval", "1m").replace("$__range", "1h")
    expr = re.sub(r"\$\{[^}]*\}", ".*", expr)
    return re.sub(r"\$[A-Za-z_]\w*", ".*", expr)


def promql_names(expr: str) -> tuple[set[str], list[tuple[str, str, str, str]], set[str]]:
    """Returns (metric names, label matchers (metric, label, op, value),
    grouping labels) used in a PromQL expression. A small scanner, enough for
    the expressions of this directory."""
    matchers = []
    for m in re.finditer(r"([a-zA-Z_:][a-zA-Z0-9_:]*)?\s*\{([^}]*)\}", expr):
        metric = m.group(1) or ""
        for lm in re.finditer(r'([a-zA-Z_]\w*)\s*(=~|!~|!=|=)\s*"([^"]*)"', m.group(2)):
            matchers.append((metric, lm.group(1), lm.group(2), lm.group(3)))
    grouping = set()
    for g in re.finditer(r"\b(?:by|without|on|ignoring|group_left|group_right)\s*\(([^)]*)\)", expr):
        grouping |= {x.strip() for x in g.group(1).split(",") if x.strip()}
    s = re.sub(r'"(?:[^"\\]|\\.)*"|\'(?:[^\'\\]|\\.)*\'', '""', expr)
    s = re.sub(r"\{[^}]*\}", " ", s)
    s = re.sub(r"\[[^\]]*\]", " ", s)
    s = re.sub(r"\b(?:by|without|on|ignoring|group_left|group_right)\s*\([^)]*\)", " ", s)
    names = set()
    for m in re.finditer(r"\b([a-zA-Z_:][a-zA-Z0-9_:]*)\b(\s*\()?", s):
        word, call = m.group(1), m.group(2)
        start = m.start(1)
        if start > 0 and (s[start - 1].isdigit() or s[start - 1] == "."):
            continue
        if call or word.lower() in PROMQL_KEYWORDS:
            continue
        names.add(word)
    return names, matchers, grouping


def base_metric(name: str, metrics: dict[str, Metric]) -> str | None:
    if name in metrics:
        return name
    for suffix in ("_bucket", "_sum", "_count"):
        if name.endswith(suffix) and metrics.get(name[: -len(suffix)], Metric("")).type == "histogram":
            return name[: -len(suffix)]
    return None


def check_exprs(where: str, exprs: list[str], metrics: dict[str, Metric]) -> None:
    unknown, bad_labels = set(), []
    all_labels = set(TARGET_LABELS) | {"le"}
    for m in metrics.values():
        all_labels |= set(m.labels)
    used = set()
    for expr in exprs:
        names, matchers, grouping = promql_names(strip_grafana(expr))
        for n in names:
            b = base_metric(n, metrics)
            if b is None:
                unknown.add(n)
            else:
                used.add(b)
        for metric, label, op, value in matchers:
            b = base_metric(metric, metrics) if metric else None
            if metric and b is None:
                continue  # reported as unknown
            allowed = (set(metrics[b].labels) | TARGET_LABELS | ({"le"} if metric.endswith("_bucket") else set())) if b else all_labels
            if label not in allowed:
                bad_labels.append(f"{metric}{{{label}}}")
                continue
            values = metrics[b].labels.get(label) if b else None
            if values is None or ".*" in value:
                continue
            if op in ("=", "!="):
                alts = [value]
            else:
                alts = value.split("|")
                if not all(re.fullmatch(r"[A-Za-z0-9_.]+", a) for a in alts):
                    continue
            for a in alts:
                if a not in values:
                    bad_labels.append(f'{metric}{{{label}{op}"{a}"}} (allowed: {sorted(values)})')
        for g in grouping:
            if g not in all_labels:
                bad_labels.append(f"grouping label {g}")
    check(not unknown, f"{where}: every metric is in docs/telemetry.md", f"unknown: {sorted(unknown)}")
    check(not bad_labels, f"{where}: every label and label value is in docs/telemetry.md", "; ".join(bad_labels))
    if not exprs:
        check(False, f"{where}: has expressions")
    return used


# ----------------------------------------------------------------- the files

def load_yaml(path: Path, many: bool = False):
    try:
        with path.open() as f:
            docs = list(yaml.safe_load_all(f)) if many else yaml.safe_load(f)
        check(True, f"{path.name}: YAML parses")
        return docs
    except (OSError, yaml.YAMLError) as e:
        check(False, f"{path}: YAML parses", str(e).replace("\n", " "))
        return None


def check_alerts(deploy: Path, metrics: dict[str, Metric], refit_seconds: int | None) -> None:
    rules = load_yaml(deploy / "prometheus" / "alerts.yml")
    if not rules:
        return
    alerts = [r for g in rules.get("groups", []) for r in g.get("rules", []) if "alert" in r]
    names = {a["alert"] for a in alerts}
    wanted = {"ApportionDown", "ApportionNotReady", "ApportionConsumerLagGrowing", "ApportionDeadLetterRateHigh",
              "ApportionNoCreditWhileConversionsFlow", "ApportionModelRefitFailing", "ApportionModelStale",
              "ApportionDiskAlmostFull"}
    check(wanted <= names, "alerts.yml: has the alerts of the runbook", f"missing: {sorted(wanted - names)}")
    check_exprs("alerts.yml", [a["expr"] for a in alerts], metrics)
    bad = [a["alert"] for a in alerts
           if not {"summary", "description", "runbook"} <= set(a.get("annotations", {}))
           or a.get("labels", {}).get("severity") not in ("page", "warning")]
    check(not bad, "alerts.yml: every alert has severity, summary, description and runbook", str(bad))
    readme = (deploy / "README.md").read_text() if (deploy / "README.md").exists() else ""
    anchors = {a.lower() for a in re.findall(r"^#+\s+`?(Apportion\w+)`?\s*$", readme, re.M)}
    missing = [a["alert"] for a in alerts if a["alert"].lower() not in anchors]
    check(not missing, "alerts.yml: every alert has a section in deploy/README.md", str(missing))
    tests = load_yaml(deploy / "prometheus" / "alerts_test.yml")
    if tests:
        tested = {t.get("alertname") for c in tests.get("tests", []) for t in c.get("alert_rule_test", [])}
        firing = {t.get("alertname") for c in tests.get("tests", []) for t in c.get("alert_rule_test", [])
                  if t.get("exp_alerts")}
        quiet = {t.get("alertname") for c in tests.get("tests", []) for t in c.get("alert_rule_test", [])
                 if not t.get("exp_alerts")}
        check(names <= firing, "alerts_test.yml: every alert has a case where it fires", str(sorted(names - firing)))
        # A case where it does not fire: an empty exp_alerts, or input series of
        # other instances/partitions/models that must stay out of exp_alerts.
        multi = set()
        for c in tests.get("tests", []):
            series = c.get("input_series", [])
            for t in c.get("alert_rule_test", []):
                if t.get("exp_alerts") and len(series) > len(t["exp_alerts"]) + 1:
                    multi.add(t.get("alertname"))
        check(names <= (quiet | multi), "alerts_test.yml: every alert has a case where it does not fire",
              str(sorted(names - quiet - multi)))
        check(tested <= names, "alerts_test.yml: tests only existing alerts", str(sorted(tested - names)))
    if refit_seconds is not None:
        stale = next((a for a in alerts if a["alert"] == "ApportionModelStale"), None)
        want = 3 * refit_seconds
        check(stale is not None and re.search(rf"\b{want}\b", stale["expr"]) is not None,
              f"alerts.yml: ApportionModelStale threshold is 3 x refit_interval ({want} s)",
              stale["expr"] if stale else "missing")


def check_dashboard(deploy: Path, metrics: dict[str, Metric], promtool: str | None) -> None:
    path = deploy / "grafana" / "apportion-dashboard.json"
    try:
        dash = json.loads(path.read_text())
        check(True, "apportion-dashboard.json: JSON parses")
    except (OSError, json.JSONDecodeError) as e:
        check(False, "apportion-dashboard.json: JSON parses", str(e))
        return
    tvars = dash.get("templating", {}).get("list", [])
    ds_vars = [v["name"] for v in tvars if v.get("type") == "datasource" and v.get("query") == "prometheus"]
    check(bool(ds_vars), "dashboard: has a Prometheus data source variable")
    panels = []
    for p in dash.get("panels", []):
        panels.append(p)
        panels.extend(p.get("panels", []))
    ids = [p.get("id") for p in panels]
    check(len(ids) == len(set(ids)) and None not in ids, "dashboard: panel ids are unique")
    exprs, bad_ds, bad_grid = [], [], []
    for p in panels:
        if "gridPos" not in p:
            bad_grid.append(p.get("title"))
        if p.get("type") == "row":
            continue
        for t in p.get("targets", []):
            exprs.append(t.get("expr", ""))
            uid = (t.get("datasource") or p.get("datasource") or {}).get("uid", "")
            if not ds_vars or uid not in {f"${{{v}}}" for v in ds_vars} | {f"${v}" for v in ds_vars}:
                bad_ds.append(p.get("title"))
    check(not bad_ds, "dashboard: every query uses the data source variable", str(bad_ds))
    check(not bad_grid, "dashboard: every panel has a gridPos", str(bad_grid))
    var_exprs = []
    for v in tvars:
        q = v.get("query")
        q = q.get("query") if isinstance(q, dict) else q
        if v.get("type") == "query" and q:
            m = re.fullmatch(r"label_values\((.*),\s*(\w+)\)", q.strip())
            var_exprs.append(m.group(1) if m else q)
    used = check_exprs("dashboard", exprs + var_exprs, metrics)
    exported = {m.name for m in metrics.values() if m.exported}
    check(used >= exported, "dashboard: shows every metric of the spec", f"not shown: {sorted(exported - (used or set()))}")
    # PromQL syntax: promtool parses each query as a recording rule.
    if promtool:
        rules = {"groups": [{"name": "dashboard", "rules": [
            {"record": f"dashboard:query_{i}", "expr": strip_grafana(e)} for i, e in enumerate(exprs + var_exprs)]}]}
        with tempfile.NamedTemporaryFile("w", suffix=".yml", delete=False) as f:
            yaml.safe_dump(rules, f)
        r = subprocess.run([promtool, "check", "rules", f.name], capture_output=True, text=True)
        Path(f.name).unlink()
        check(r.returncode == 0, "dashboard: every query parses as PromQL (promtool)", (r.stdout + r.stderr).strip())


CONFIG_SCHEMA = {
    "data_dir": str, "models": list, "lookback": str, "view_lookback": str, "expiry": str,
    "half_life": str, "allowed_lateness": str, "late_policy": str, "idle_timeout": str,
    "refit_interval": str,
    "admin": {"listen": str},
    "kafka": {"brokers": str, "group_id": str, "input_topics": list, "credit_topic": str,
              "paths_topic": str, "dead_letter_topic": str, "input_keyed_by_user": bool, "properties": dict},
    "log": {"format": str},
}
MODELS = {"last_touch", "first_touch", "linear", "time_decay", "u_shaped", "shapley", "markov"}
DURATION = re.compile(r"^\d+(ms|s|m|h|d|w)$")


def duration_seconds(s: str) -> int:
    n, unit = re.match(r"^(\d+)(ms|s|m|h|d|w)$", s).groups()
    return int(n) * {"ms": 0, "s": 1, "m": 60, "h": 3600, "d": 86400, "w": 604800}[unit]


def check_config(where: str, cfg: dict) -> None:
    errs = []

    def walk(schema: dict, got: dict, prefix: str) -> None:
        for k in got:
            if k not in schema:
                errs.append(f"unknown key {prefix}{k}")
        for k, typ in schema.items():
            if k not in got:
                errs.append(f"missing key {prefix}{k}")
            elif isinstance(typ, dict):
                walk(typ, got[k], f"{prefix}{k}.") if isinstance(got[k], dict) else errs.append(f"{prefix}{k} not a table")
            elif not isinstance(got[k], typ):
                errs.append(f"{prefix}{k} is {type(got[k]).__name__}, wanted {typ.__name__}")

    walk(CONFIG_SCHEMA, cfg, "")
    if not errs:
        if not set(cfg["models"]) <= MODELS or not cfg["models"]:
            errs.append(f"models {cfg['models']}")
        for k in ("lookback", "view_lookback", "expiry", "half_life", "allowed_lateness", "idle_timeout", "refit_interval"):
            if not DURATION.match(cfg[k]):
                errs.append(f"{k} = {cfg[k]!r} is not a duration")
        if cfg["late_policy"] not in ("dead_letter", "apply"):
            errs.append(f"late_policy = {cfg['late_policy']!r}")
        if not cfg["admin"]["listen"].endswith(":9464"):
            errs.append("admin.listen is not on port 9464")
        if cfg["data_dir"] != "/var/lib/apportion":
            errs.append("data_dir is not the image's volume /var/lib/apportion")
    check(not errs, f"{where}: keys and values match the config schema", "; ".join(errs))


def check_configs(deploy: Path, k8s_docs: list) -> dict | None:
    try:
        cfg = tomllib.loads((deploy / "config" / "apportion.toml").read_text())
        check(True, "config/apportion.toml: TOML parses")
    except (OSError, tomllib.TOMLDecodeError) as e:
        check(False, "config/apportion.toml: TOML parses", str(e))
        return None
    check_config("config/apportion.toml", cfg)
    cm = next((d for d in k8s_docs if d and d.get("kind") == "ConfigMap"), None)
    if cm and "apportion.toml" in cm.get("data", {}):
        try:
            kcfg = tomllib.loads(cm["data"]["apportion.toml"])
            check_config("k8s ConfigMap apportion.toml", kcfg)
            a = json.loads(json.dumps(cfg)); b = json.loads(json.dumps(kcfg))
            a["kafka"].pop("brokers", None); b["kafka"].pop("brokers", None)
            check(a == b, "k8s ConfigMap: same settings as config/apportion.toml except kafka.brokers")
        except tomllib.TOMLDecodeError as e:
            check(False, "k8s ConfigMap apportion.toml: TOML parses", str(e))
    else:
        check(False, "k8s: a ConfigMap with key apportion.toml")
    return cfg


def default_config_keys(text: str) -> dict:
    """Parses a documented default config, including the settings it shows
    commented out (`# key = value`, `# [table]`), e.g. the optional [kafka]
    table."""
    out = []
    for line in text.splitlines():
        m = re.match(r'^# (\[[a-z_.]+\]|(?:"[\w.]+"|[a-z_][a-z0-9_]*)\s*=\s*(?:"|\[|-?\d|true|false).*)$', line)
        out.append(m.group(1) if m else line)
    try:
        return tomllib.loads("\n".join(out))
    except tomllib.TOMLDecodeError:
        return tomllib.loads(text)


def check_service_config(repo: Path, binary: Path, cfg: dict | None, cm_text: str | None) -> None:
    """The example configs against the service's own config schema: with the
    built binary, `apportion --config FILE config` must accept them; without
    it, every key must appear in services/serve/src/default_config.toml
    (the file `config --print-default` prints)."""
    if cfg is None:
        return
    sources = [("config/apportion.toml", repo / "deploy" / "config" / "apportion.toml")]
    tmp = None
    if cm_text is not None:
        tmp = tempfile.NamedTemporaryFile("w", suffix=".toml", delete=False)
        tmp.write(cm_text)
        tmp.close()
        sources.append(("k8s ConfigMap apportion.toml", Path(tmp.name)))
    try:
        if binary.is_file():
            env = {k: v for k, v in os.environ.items() if not k.startswith("APPORTION_")}
            for name, path in sources:
                r = subprocess.run([str(binary), "--config", str(path), "config"],
                                   capture_output=True, text=True, timeout=60, env=env)
                check(r.returncode == 0, f"{name}: accepted by `apportion --config FILE config` ({binary})",
                      (r.stdout + r.stderr).strip())
            return
        default_file = repo / "services" / "serve" / "src" / "default_config.toml"
        if not default_file.is_file():
            print(f"  skip {binary} not built and {default_file} missing: config not compared with the service")
            return
        default = default_config_keys(default_file.read_text())
        for name, path in sources:
            extra = []

            def walk(ours: dict, theirs: dict, prefix: str) -> None:
                for k, v in ours.items():
                    if prefix == "kafka." and k == "properties":
                        continue
                    if k not in theirs:
                        extra.append(prefix + k)
                    elif isinstance(v, dict) and isinstance(theirs[k], dict):
                        walk(v, theirs[k], f"{prefix}{k}.")

            walk(tomllib.loads(path.read_text()), default, "")
            check(not extra, f"{name}: every key is in services/serve/src/default_config.toml", str(extra))
    finally:
        if tmp is not None:
            Path(tmp.name).unlink()


def check_dockerfile(deploy: Path) -> str | None:
    path = deploy / "Dockerfile"
    try:
        text = path.read_text()
    except OSError as e:
        check(False, "Dockerfile exists", str(e))
        return None
    # Join continuation lines, drop comments.
    logical = re.sub(r"\\\n", " ", "\n".join(l for l in text.splitlines() if not l.lstrip().startswith("#")))
    instr = [(l.split(None, 1)[0].upper(), (l.split(None, 1) + [""])[1].strip())
             for l in logical.splitlines() if l.strip()]
    args = {}
    for k, a in instr:
        if k == "ARG" and "=" in a:
            name, val = a.split("=", 1)
            args.setdefault(name.strip(), val.strip())
    froms = [re.sub(r"\$\{(\w+)\}", lambda m: args.get(m.group(1), m.group(0)), a) for i, a in instr if i == "FROM"]
    check(bool(froms) and re.search(r"\bAS\s+build\b", froms[0], re.I) is not None,
          "Dockerfile: first stage is FROM ... AS build", str(froms[:1]))
    check(len(froms) >= 2, "Dockerfile: has a second (runtime) FROM", str(froms))
    check(bool(froms) and re.match(r"rust:\S*bookworm\b", froms[0]) is not None,
          "Dockerfile: builds in the Rust image on Debian bookworm", str(froms[:1]))
    check(len(froms) >= 2 and froms[-1].split()[0] == "debian:bookworm-slim",
          "Dockerfile: runs on debian:bookworm-slim", str(froms[-1:]))
    last_from = max(i for i, (k, _) in enumerate(instr) if k == "FROM") if froms else 0
    users = [a for i, (k, a) in enumerate(instr) if k == "USER" and i > last_from]
    check(bool(users) and users[-1].split(":")[0] not in ("root", "0"),
          "Dockerfile: runtime stage runs as a non-root USER", str(users))
    hc = [a for k, a in instr if k == "HEALTHCHECK"]
    check(bool(hc) and "apportion" in hc[-1] and "health" in hc[-1] and "/healthz" in hc[-1],
          "Dockerfile: HEALTHCHECK runs `apportion health` against /healthz", str(hc))
    check(any(k == "EXPOSE" and "9464" in a for k, a in instr), "Dockerfile: EXPOSE 9464")
    check(any(k == "VOLUME" and "/var/lib/apportion" in a for k, a in instr), "Dockerfile: VOLUME /var/lib/apportion")
    ep = [a for k, a in instr if k == "ENTRYPOINT"]
    check(bool(ep) and json.loads(ep[-1]) == ["apportion"], 'Dockerfile: ENTRYPOINT ["apportion"]', str(ep))
    cmd = [a for k, a in instr if k == "CMD"]
    cmd_list = json.loads(cmd[-1]) if cmd else []
    check(cmd_list[:2] == ["serve", "--config"] and len(cmd_list) == 3, "Dockerfile: CMD serve --config FILE", str(cmd))
    ign = deploy / "Dockerfile.dockerignore"
    ign_lines = ign.read_text().split() if ign.exists() else []
    check("target" in ign_lines and ".git" in ign_lines, "Dockerfile.dockerignore: keeps target/ and .git/ out of the context")
    return cmd_list[2] if len(cmd_list) == 3 else None


def check_compose(deploy: Path, config_path: str | None) -> None:
    c = load_yaml(deploy / "compose.yaml")
    if not c:
        return
    svcs = c.get("services", {})
    check({"kafka", "apportion", "prometheus"} <= set(svcs), "compose: services kafka, apportion, prometheus",
          str(sorted(svcs)))
    if not {"kafka", "apportion", "prometheus"} <= set(svcs):
        return
    k = svcs["kafka"]
    env = k.get("environment", {})
    check(str(k.get("image", "")).startswith("apache/kafka:") and "controller" in str(env.get("KAFKA_PROCESS_ROLES", "")),
          "compose: kafka is apache/kafka in KRaft mode (broker,controller)")
    a = svcs["apportion"]
    b = a.get("build", {})
    check(isinstance(b, dict) and b.get("dockerfile") == "deploy/Dockerfile"
          and (deploy / b.get("context", "")).resolve() == deploy.parent.resolve(),
          "compose: apportion builds deploy/Dockerfile with the repository root as context")
    vols = [v for v in a.get("volumes", []) if isinstance(v, str)]
    cfg_mount = [v for v in vols if v.split(":")[1:2] == [config_path or "/etc/apportion/apportion.toml"]]
    check(bool(cfg_mount) and (deploy / cfg_mount[0].split(":")[0]).resolve() == (deploy / "config" / "apportion.toml").resolve(),
          "compose: config/apportion.toml is mounted where the image's CMD reads it", str(vols))
    check(any(v.split(":")[1:2] == ["/var/lib/apportion"] for v in vols), "compose: a volume for /var/lib/apportion")
    key_from_env_file = bool(a.get("env_file"))
    key_inline = "APPORTION_PSEUDONYM_KEY" in str(a.get("environment", ""))
    check(key_from_env_file or key_inline or a.get("secrets"), "compose: apportion gets APPORTION_PSEUDONYM_KEY from an env file or secret")
    example = deploy / "apportion.env.example"
    check(example.exists() and "APPORTION_PSEUDONYM_KEY=" in example.read_text(), "compose: apportion.env.example documents the key")
    check(any(str(p).split(":")[-1] == "9464" for p in a.get("ports", [])), "compose: apportion publishes 9464")
    deps = a.get("depends_on", {})
    check("kafka" in deps, "compose: apportion depends on kafka")
    p = svcs["prometheus"]
    pv = [v for v in p.get("volumes", []) if isinstance(v, str)]
    ok = True
    for f in ("prometheus.yml", "alerts.yml"):
        m = [v for v in pv if v.split(":")[0].endswith(f)]
        ok &= bool(m) and (deploy / m[0].split(":")[0]).exists()
    check(ok, "compose: prometheus mounts prometheus.yml and alerts.yml from deploy/prometheus", str(pv))
    prom = load_yaml(deploy / "prometheus" / "prometheus.yml")
    if prom:
        targets = [t for sc in prom.get("scrape_configs", []) if sc.get("job_name") == "apportion"
                   for s in sc.get("static_configs", []) for t in s.get("targets", [])]
        check("apportion:9464" in targets, "prometheus.yml: job apportion scrapes apportion:9464", str(targets))


def check_k8s(deploy: Path, config_path: str | None) -> list:
    docs = []
    for f in sorted((deploy / "k8s").glob("*.yaml")):
        loaded = load_yaml(f, many=True)
        if loaded is None:
            continue
        for d in loaded:
            if d is None:
                continue
            d["__file"] = f.name
            docs.append(d)
    objs = [d for d in docs if d.get("kind") != "Kustomization"]
    bad = [d["__file"] for d in objs if not (d.get("apiVersion") and d.get("kind") and d.get("metadata", {}).get("name"))]
    check(not bad, "k8s: every object has apiVersion, kind and metadata.name", str(bad))
    ns = [d["__file"] for d in objs if "namespace" in d.get("metadata", {})]
    check(not ns, "k8s: manifests are namespace-less", str(ns))
    by_kind = {}
    for d in objs:
        by_kind.setdefault(d["kind"], []).append(d)
    need = {"StatefulSet", "Service", "ConfigMap", "Secret", "PodDisruptionBudget"}
    check(need <= set(by_kind), "k8s: StatefulSet, Service, ConfigMap, Secret, PodDisruptionBudget", str(sorted(by_kind)))
    if not need <= set(by_kind):
        return docs
    sts, svc, cm, sec, pdb = (by_kind[k][0] for k in ("StatefulSet", "Service", "ConfigMap", "Secret", "PodDisruptionBudget"))
    spec = sts["spec"]
    tmpl = spec["template"]
    pod = tmpl["spec"]
    sel = spec["selector"]["matchLabels"]
    check(all(tmpl["metadata"]["labels"].get(k) == v for k, v in sel.items()), "k8s: StatefulSet selector matches its pod labels")
    check(svc["spec"].get("clusterIP") == "None" and spec.get("serviceName") == svc["metadata"]["name"],
          "k8s: StatefulSet serviceName is the headless Service")
    check(all(svc["spec"]["selector"].get(k) == v for k, v in sel.items())
          and any(p.get("port") == 9464 for p in svc["spec"].get("ports", [])),
          "k8s: Service selects the pods and has the metrics port 9464")
    check(all(pdb["spec"]["selector"]["matchLabels"].get(k) == v for k, v in sel.items()), "k8s: PodDisruptionBudget selects the pods")
    c = next((c for c in pod["containers"] if c["name"] == "apportion"), pod["containers"][0])
    ports = {p.get("name"): p.get("containerPort") for p in c.get("ports", [])}

    def probe(name: str, path: str) -> bool:
        pr = c.get(name, {}).get("httpGet", {})
        port = pr.get("port")
        return pr.get("path") == path and (port == 9464 or ports.get(port) == 9464)

    check(probe("livenessProbe", "/healthz"), "k8s: liveness probe GET /healthz on 9464")
    check(probe("readinessProbe", "/readyz"), "k8s: readiness probe GET /readyz on 9464")
    res = c.get("resources", {})
    check(bool(res.get("requests")) and bool(res.get("limits")), "k8s: resources requests and limits")
    vct = spec.get("volumeClaimTemplates", [])
    mounts = {m["name"]: m["mountPath"] for m in c.get("volumeMounts", [])}
    check(bool(vct) and mounts.get(vct[0]["metadata"]["name"]) == "/var/lib/apportion",
          "k8s: volumeClaimTemplates mounted at /var/lib/apportion")
    psc, csc = pod.get("securityContext", {}), c.get("securityContext", {})
    uid = csc.get("runAsUser", psc.get("runAsUser"))
    check((psc.get("runAsNonRoot") or csc.get("runAsNonRoot")) is True and uid not in (None, 0),
          "k8s: securityContext runs as non-root", f"runAsUser={uid}")
    tgp = pod.get("terminationGracePeriodSeconds", 30)
    check(tgp > 30, "k8s: terminationGracePeriodSeconds exceeds the 30 s shutdown grace", str(tgp))
    envs = {e["name"]: e for e in c.get("env", [])}
    ref = envs.get("APPORTION_PSEUDONYM_KEY", {}).get("valueFrom", {}).get("secretKeyRef", {})
    check(ref.get("name") == sec["metadata"]["name"] and ref.get("key") in sec.get("stringData", sec.get("data", {})),
          "k8s: APPORTION_PSEUDONYM_KEY comes from the Secret")
    vols = {v["name"]: v for v in pod.get("volumes", [])}
    cfg_vol = next((n for n, v in vols.items() if v.get("configMap", {}).get("name") == cm["metadata"]["name"]), None)
    args = c.get("args", [])
    cfg_arg = args[args.index("--config") + 1] if "--config" in args else config_path
    check(cfg_vol is not None and cfg_arg is not None and cfg_arg == f"{mounts.get(cfg_vol, '')}/apportion.toml",
          "k8s: the ConfigMap is mounted where --config reads it", f"--config {cfg_arg}, mount {mounts.get(cfg_vol)}")
    kust = next((d for d in docs if d.get("kind") == "Kustomization"), None)
    if kust:
        res_files = kust.get("resources", [])
        check(all((deploy / "k8s" / r).exists() for r in res_files) and sec["__file"] not in res_files,
              "k8s: kustomization lists existing files and leaves the Secret template out", str(res_files))
    return docs


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repo", default=str(Path(__file__).resolve().parents[1]))
    ap.add_argument("--promtool", default=None)
    ap.add_argument("--bin", default=None)
    args = ap.parse_args()
    repo = Path(args.repo)
    deploy = repo / "deploy"
    tele_path = repo / "docs" / "telemetry.md"
    metrics = parse_telemetry(tele_path)
    check(len(metrics) > 1, "docs/telemetry.md: metric sections parse", f"{len(metrics)} found")
    check_telemetry_rules(metrics, tele_path.read_text())

    config_path = check_dockerfile(deploy)
    check_compose(deploy, config_path)
    docs = check_k8s(deploy, config_path)
    cfg = check_configs(deploy, docs)
    refit = duration_seconds(cfg["refit_interval"]) if cfg and DURATION.match(str(cfg.get("refit_interval", ""))) else None
    check_alerts(deploy, metrics, refit)
    check_dashboard(deploy, metrics, args.promtool)
    cm = next((d for d in docs if d and d.get("kind") == "ConfigMap"), None)
    cm_text = cm.get("data", {}).get("apportion.toml") if cm else None
    check_service_config(repo, Path(args.bin) if args.bin else repo / "target" / "release" / "apportion", cfg, cm_text)

    passed = sum(1 for ok, _ in RESULTS if ok)
    failed = len(RESULTS) - passed
    print(f"static checks: {passed} ok, {failed} failed")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
