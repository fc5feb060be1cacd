"""Keep deploy/ honest.

What is checked, and against what:

* every YAML file parses (PyYAML ``safe_load_all``);
* every ``sketchmerge ...`` command line in deploy/ (Kubernetes command/args,
  compose entrypoint/command, crontab lines, systemd ``ExecStart=``, shell
  lines, the README's code blocks, the Dockerfile) parses with the real parser,
  ``sketchmerge.cli.make_parser()``; ``dask scheduler`` / ``dask worker`` lines
  parse with distributed's own click commands (nothing is executed);
* the CronJob's pod failure policy, evaluated the way the Kubernetes batch/v1
  API reference describes ``podFailurePolicy`` (first matching rule wins; exit
  code 0 is excluded; unmatched failures count towards ``backoffLimit``), fails
  the Job on the bad-input codes and retries the transient ones, as named by
  ``sketchmerge.cli.EXIT_CODES``;
* versions agree: pyproject.toml == ``sketchmerge.__version__`` == image tags
  in manifests and compose == the Dockerfile's label; the Dockerfile's Python
  satisfies ``requires-python``; every pin in the constraints file satisfies
  pyproject's range (``packaging.specifiers``, the PEP 440 reference code);
* no file holds anything that looks like a credential; compose publishes ports
  on 127.0.0.1 only; worker memory limits agree with container limits;
* the retry wrapper retries exactly the transient codes (run against a stub);
* the compose seed script and nightly build run against the local S3-compatible
  test server (moto, 127.0.0.1), checked against pyarrow/numpy reads of the data.
"""

from __future__ import annotations

import getpass
import grp
import json
import math
import os
import re
import shlex
import shutil
import stat
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

yaml = pytest.importorskip("yaml")

import sketchmerge
from sketchmerge.cli import EXIT_CODES, make_parser

ROOT = Path(__file__).resolve().parents[1]
DEPLOY = ROOT / "deploy"
K8S = DEPLOY / "k8s"
COMPOSE = DEPLOY / "compose" / "docker-compose.yml"
SINGLE = DEPLOY / "single-host"
RUNNER = DEPLOY / "bin" / "sketchmerge-run"
DOCKERFILE = DEPLOY / "docker" / "Dockerfile"
CONSTRAINTS = DEPLOY / "docker" / "constraints.txt"

# The exit-code policy of the project's README table: which codes are worth a retry.
BAD_INPUT = {EXIT_CODES[k] for k in ("usage", "bad_input", "no_input", "format")}
TRANSIENT = {EXIT_CODES[k] for k in ("storage", "scheduler", "race")}
SUBCOMMANDS = ("build", "show", "verify", "demo", "history", "gc", "diff", "export")


def _pyproject() -> dict:
    with open(ROOT / "pyproject.toml", "rb") as f:
        return tomllib.load(f)


VERSION = _pyproject()["project"]["version"]


# --------------------------------------------------------------------------- command extraction
# Words after which a word is in command position (shell keywords and wrappers
# that run their arguments as a command).
_PREFIXES = {"sudo", "exec", "env", "nice", "nohup", "time", "command", "if", "then", "else",
             "elif", "do", "while", "until", "!"}
_CONTROL = {"&&", "||", ";", "|", "&", "(", ")", ";;", "|&", ";&"}
_SHELLS = {"sh", "bash", "dash"}


def _logical_lines(text: str) -> list[str]:
    """Lines with backslash-newline continuations joined (shell, systemd, Dockerfile)."""
    return text.replace("\\\n", " ").splitlines()


def _shell_words(line: str) -> list[list[str]]:
    """The simple commands of one shell line, each as its words (redirections dropped)."""
    lex = shlex.shlex(line, posix=True, punctuation_chars=True)
    lex.whitespace_split = True
    lex.commenters = "#"
    cmds, cur, skip_next = [], [], False
    for tok in lex:
        if skip_next:
            skip_next = False
            continue
        if tok in _CONTROL:
            cmds.append(cur)
            cur = []
        elif set(tok) <= set("<>&|;()") and ("<" in tok or ">" in tok):
            if cur and cur[-1].isdigit():  # "2>&1": the fd number belongs to the redirection
                cur.pop()
            skip_next = True
        else:
            cur.append(tok)
    cmds.append(cur)
    return [c for c in cmds if c]


def invocations(words: list[str], where: str) -> list[tuple[str, list[str], list[str]]]:
    """``(where, prefix words, argv after 'sketchmerge')`` for each sketchmerge call in ``words``.

    A word named ``sketchmerge`` (any directory) is a call when it is in command
    position: first, after ``--``, after a wrapper or keyword, or after an
    environment assignment.  ``sh -c SCRIPT`` is searched recursively.
    """
    out = []
    for i, w in enumerate(words[:-2]):
        if os.path.basename(w) in _SHELLS and words[i + 1] == "-c":
            out += shell_invocations(words[i + 2], where + " (sh -c)")
    for i, w in enumerate(words):
        if os.path.basename(w) != "sketchmerge":
            continue
        prev = words[i - 1] if i else None
        if (i == 0 or prev == "--" or os.path.basename(prev) in _PREFIXES
                or re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*=.*", prev)):
            out.append((where, words[:i], words[i + 1:]))
    return out


def shell_invocations(text: str, where: str) -> list[tuple[str, list[str], list[str]]]:
    out = []
    for n, line in enumerate(_logical_lines(text), 1):
        for words in _shell_words(line):
            out += invocations(words, f"{where}:{n}")
    return out


def _dockerfile() -> list[tuple[str, str]]:
    """(instruction, rest) pairs of the Dockerfile, continuations joined, comments dropped."""
    out = []
    for line in _logical_lines(DOCKERFILE.read_text()):
        s = line.strip()
        if not s or s.startswith("#"):
            continue
        ins, _, rest = s.partition(" ")
        out.append((ins.upper(), rest.strip()))
    return out


def image_entrypoint() -> list[str]:
    eps = [json.loads(rest) for ins, rest in _dockerfile() if ins == "ENTRYPOINT"]
    assert eps, "deploy/docker/Dockerfile: expected an ENTRYPOINT, got none"
    return eps[-1]


def _is_sketchmerge_image(ref: str) -> bool:
    name = ref.rsplit("@", 1)[0]
    name = name.rsplit(":", 1)[0] if ":" in name.rsplit("/", 1)[-1] else name
    return name.rsplit("/", 1)[-1] == "sketchmerge"


def _image_tag(ref: str) -> str | None:
    last = ref.rsplit("/", 1)[-1]
    return last.split(":", 1)[1] if ":" in last else None


def _load_yaml_all(path: Path) -> list:
    with open(path) as f:
        return [d for d in yaml.safe_load_all(f) if d is not None]


def k8s_objects() -> list[tuple[str, dict]]:
    out = []
    for p in sorted(K8S.glob("*.yaml")):
        if p.name == "kustomization.yaml":
            continue
        out += [(p.name, d) for d in _load_yaml_all(p)]
    return out


def pod_template(obj: dict) -> dict | None:
    kind, spec = obj.get("kind"), obj.get("spec", {})
    if kind in ("Deployment", "StatefulSet", "DaemonSet", "Job"):
        return spec["template"]
    if kind == "CronJob":
        return spec["jobTemplate"]["spec"]["template"]
    return None


def pod_spec(obj: dict) -> dict | None:
    t = pod_template(obj)
    return None if t is None else t["spec"]


def k8s_containers() -> list[tuple[str, dict, dict]]:
    """(where, object, container) for every container and init container."""
    out = []
    for fname, obj in k8s_objects():
        ps = pod_spec(obj)
        if ps is None:
            continue
        for c in ps.get("initContainers", []) + ps.get("containers", []):
            out.append((f"{fname}:{obj['kind']}/{obj['metadata']['name']}/{c['name']}", obj, c))
    return out


def container_argv(c: dict, entrypoint: list[str]) -> list[str]:
    """What a container runs: command (else the image's entrypoint) + args."""
    cmd = c.get("command")
    if cmd is None:
        assert _is_sketchmerge_image(c["image"]), f"{c['name']}: no command and not our image"
        cmd = entrypoint
    return [str(x) for x in cmd] + [str(x) for x in c.get("args", [])]


def compose() -> dict:
    return yaml.safe_load(COMPOSE.read_text())


def _as_words(v) -> list[str]:
    if v is None:
        return []
    return shlex.split(v) if isinstance(v, str) else [str(x) for x in v]


def compose_argv(svc: dict, entrypoint: list[str]) -> list[str]:
    ep = _as_words(svc["entrypoint"]) if "entrypoint" in svc else (
        entrypoint if _is_sketchmerge_image(svc.get("image", "")) else [])
    return ep + _as_words(svc.get("command"))


def _unit(path: Path) -> list[tuple[str, str, str]]:
    """(section, key, value) of a systemd unit file, continuations joined."""
    out, section = [], None
    for line in _logical_lines(path.read_text()):
        s = line.strip()
        if not s or s[0] in "#;":
            continue
        if s.startswith("["):
            section = s.strip("[]")
            continue
        k, _, v = s.partition("=")
        out.append((section, k.strip(), v.strip()))
    return out


def _cron_jobs(path: Path) -> list[tuple[list[str], str, str]]:
    """(5 schedule fields, user, command) of a cron.d file."""
    jobs = []
    for line in path.read_text().splitlines():
        s = line.strip()
        if not s or s.startswith("#") or re.match(r"^[A-Za-z_][A-Za-z0-9_]*=", s):
            continue
        parts = s.split(None, 6)
        assert len(parts) == 7, f"{path.name}: expected 5 fields, a user and a command, got {s!r}"
        jobs.append((parts[:5], parts[5], parts[6]))
    return jobs


def _readme_blocks(path: Path) -> list[tuple[int, str]]:
    """(line number, text) of the fenced shell code blocks of a Markdown file."""
    blocks, cur, start, lang = [], None, 0, None
    for n, line in enumerate(path.read_text().splitlines(), 1):
        s = line.strip()
        if s.startswith("```"):
            if cur is None:
                cur, start, lang = [], n, s[3:].strip()
            else:
                if lang in ("bash", "sh", "shell", "console", ""):
                    blocks.append((start, "\n".join(cur)))
                cur = None
            continue
        if cur is not None:
            cur.append(s)
    return blocks


def all_commands() -> list[tuple[str, list[str], list[str]]]:
    """Every sketchmerge call in deploy/, as (where, prefix, argv)."""
    ep = image_entrypoint()
    out = []
    for where, _, c in k8s_containers():
        out += invocations(container_argv(c, ep), "k8s/" + where)
    for name, svc in compose()["services"].items():
        out += invocations(compose_argv(svc, ep), f"compose/{name}")
    for p in sorted(SINGLE.glob("*.service")):
        for sec, k, v in _unit(p):
            if k.startswith("Exec"):
                out += invocations(shlex.split(v.lstrip("-@:+!")), f"single-host/{p.name}:{k}")
    for p in sorted(SINGLE.glob("*.cron")):
        for _, user, cmd in _cron_jobs(p):
            out += shell_invocations(cmd, f"single-host/{p.name}")
    for p in sorted(DEPLOY.rglob("*.md")):
        for start, text in _readme_blocks(p):
            out += shell_invocations(text, f"{p.relative_to(DEPLOY)}:block@{start}")
    for ins, rest in _dockerfile():
        if ins == "RUN":
            out += shell_invocations(rest, "docker/Dockerfile:RUN")
    cmd = [json.loads(rest) for ins, rest in _dockerfile() if ins == "CMD"]
    out += invocations(ep + (cmd[-1] if cmd else []), "docker/Dockerfile:ENTRYPOINT+CMD")
    out += shell_invocations("\n".join(l for l in RUNNER.read_text().splitlines()
                                       if not l.lstrip().startswith("#")), "bin/sketchmerge-run")
    return out


def _option_strings(parser, sub: str | None) -> set[str]:
    import argparse

    opts = {o for a in parser._actions for o in a.option_strings}
    for a in parser._actions:
        if isinstance(a, argparse._SubParsersAction) and sub in a.choices:
            opts |= {o for b in a.choices[sub]._actions for o in b.option_strings}
    return opts


def parse(argv: list[str]):
    """Parse with the real CLI parser; None for --help/--version (argparse exits 0).

    Options must be spelled out: argparse also takes unambiguous prefixes
    ("--weight-col"), which a later option of the same prefix would break.
    """
    parser = make_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as e:
        if e.code in (0, None) and set(argv) & {"--help", "-h", "--version"}:
            return None
        raise AssertionError(f"does not parse (argparse exit {e.code}): sketchmerge {shlex.join(argv)}") from None
    known = _option_strings(parser, argv[0] if argv else None)
    for tok in argv:
        if tok == "--":
            break
        if tok.startswith("--") and tok.split("=", 1)[0] not in known:
            raise AssertionError(f"abbreviated or unknown option {tok.split('=', 1)[0]!r}: "
                                 f"sketchmerge {shlex.join(argv)}")
    return args


def _subcommand_calls(sub: str, where_prefix: str) -> list[tuple[str, list[str], list[str]]]:
    return [c for c in all_commands() if c[0].startswith(where_prefix) and c[2][:1] == [sub]]


# --------------------------------------------------------------------------- YAML and commands
def test_every_yaml_file_parses():
    files = sorted(p for p in DEPLOY.rglob("*") if p.suffix in (".yaml", ".yml"))
    assert len(files) >= 8, f"expected the k8s manifests and the compose file, got {files}"
    for p in files:
        docs = _load_yaml_all(p)  # raises on a syntax error
        assert docs, f"{p.relative_to(ROOT)}: expected at least one document, got none"
        for d in docs:
            assert isinstance(d, dict), f"{p.relative_to(ROOT)}: expected mappings, got {type(d).__name__}"


def test_every_sketchmerge_command_parses():
    cmds = all_commands()
    bad = []
    for where, _, argv in cmds:
        try:
            parse(argv)
        except AssertionError as e:
            bad.append(f"{where}: {e}")
    assert not bad, "\n".join(bad)
    # the extraction must find the calls it is meant to check (or this test checks nothing)
    for prefix in ("k8s/", "compose/", "single-host/sketchmerge-nightly.service",
                   "single-host/sketchmerge-nightly.cron", "README.md"):
        for sub in ("build", "diff"):
            assert _subcommand_calls(sub, prefix), f"expected a 'sketchmerge {sub}' in {prefix}, got none"


def test_command_parser_check_can_fail():
    # a typo'd option, a missing --out and an unknown subcommand must all be caught
    for argv in (["build", "s3://b/src", "--outt", "s3://b/t"], ["build", "s3://b/src"],
                 ["build", "s3://b/src", "--out", "s3://b/t", "--weight-col", "w"],
                 ["biuld", "s3://b/src", "--out", "s3://b/t"], ["diff", "t", "--fail-above", "high"]):
        with pytest.raises(AssertionError):
            parse(argv)
    found = shell_invocations("sketchmerge-run --attempts 1 -- sketchmerge diff t && echo sketchmerge", "x")
    assert [a for _, _, a in found] == [["diff", "t"]]
    found = invocations(["sh", "-c", "cd / && /opt/v/bin/sketchmerge build s --out t 2>&1 | cat"], "y")
    assert [a for _, _, a in found] == [["build", "s", "--out", "t"]]


def test_no_sketchmerge_command_escapes_extraction():
    # Any "sketchmerge SUBCOMMAND" on a non-comment line of a non-YAML, non-Markdown
    # file must be one that the structured extraction found (so it was parsed).
    pat = re.compile(r"(?:^|[\s/'\"])sketchmerge\s+(" + "|".join(SUBCOMMANDS) + r")\b")
    found: dict[str, int] = {}
    for where, _, argv in all_commands():
        if argv[:1] and argv[0] in SUBCOMMANDS:
            key = where.split(":")[0]  # the file part of "file:detail"
            found[key] = found.get(key, 0) + 1
    checked = 0
    for p in sorted(DEPLOY.rglob("*")):
        if not p.is_file() or p.suffix in (".yaml", ".yml", ".md"):
            continue
        hits = sum(len(pat.findall(l)) for l in p.read_text().splitlines() if not l.lstrip().startswith("#"))
        rel = p.relative_to(DEPLOY).as_posix()
        assert found.get(rel, 0) == hits, f"{rel}: {hits} 'sketchmerge <command>' lines, {found.get(rel, 0)} extracted"
        checked += hits
    assert checked >= 4


def test_build_and_diff_steps_agree():
    # each schedule's drift step looks at the table its build step writes, with the
    # documented threshold
    groups = {"k8s/nightly-cronjob.yaml": "k8s/nightly-cronjob.yaml",
              "service": "single-host/sketchmerge-nightly.service",
              "cron": "single-host/sketchmerge-nightly.cron"}
    for label, prefix in groups.items():
        builds = [parse(a) for _, _, a in _subcommand_calls("build", prefix)]
        diffs = [parse(a) for _, _, a in _subcommand_calls("diff", prefix)]
        assert len(builds) == 1 and len(diffs) == 1, f"{label}: expected one build and one diff"
        b, d = builds[0], diffs[0]
        assert d.table == b.out, f"{label}: diff reads {d.table}, build writes {b.out}"
        assert d.fail_above == 0.25, f"{label}: expected --fail-above 0.25, got {d.fail_above}"
        assert b.source.startswith("s3://") and b.out.startswith("s3://"), label
        assert not b.storage_option, f"{label}: credentials and endpoints belong in the environment"


# --------------------------------------------------------------------------- dask command lines
def _dask_params(argv: list[str]) -> tuple[str, dict]:
    """Parse 'dask scheduler|worker ...' with distributed's click commands (no execution)."""
    from distributed.cli import dask_scheduler, dask_worker

    assert os.path.basename(argv[0]) == "dask" and argv[1] in ("scheduler", "worker"), argv
    cmd = {"scheduler": dask_scheduler.main, "worker": dask_worker.main}[argv[1]]
    ctx = cmd.make_context(f"dask {argv[1]}", list(argv[2:]))
    return argv[1], ctx.params


_BIN = {"": 1, "Ki": 2 ** 10, "Mi": 2 ** 20, "Gi": 2 ** 30, "Ti": 2 ** 40,
        "k": 10 ** 3, "K": 10 ** 3, "M": 10 ** 6, "G": 10 ** 9, "T": 10 ** 12}


def k8s_bytes(q) -> float:
    """A Kubernetes memory quantity in bytes (suffixes from the Kubernetes
    "Resource Management for Pods and Containers" docs: Ki/Mi/Gi binary, k/M/G decimal)."""
    m = re.fullmatch(r"([0-9.]+)([A-Za-z]*)", str(q))
    assert m and m.group(2) in _BIN, f"expected a memory quantity, got {q!r}"
    return float(m.group(1)) * _BIN[m.group(2)]


def k8s_cpu(q) -> float:
    s = str(q)
    return float(s[:-1]) / 1000 if s.endswith("m") else float(s)


def docker_bytes(q) -> float:
    """A compose/docker byte value; b, k, m, g are binary multiples (docker's
    RAMInBytes, from memory)."""
    m = re.fullmatch(r"([0-9.]+)\s*([bkmgBKMG]?)[bB]?", str(q))
    assert m, f"expected a byte value, got {q!r}"
    return float(m.group(1)) * {"": 1, "b": 1, "k": 2 ** 10, "m": 2 ** 20, "g": 2 ** 30}[m.group(2).lower()]


def test_dask_command_lines_parse_and_point_at_the_scheduler():
    from dask.utils import parse_bytes

    ep = image_entrypoint()
    objs = k8s_objects()
    services = {o["metadata"]["name"]: o for _, o in objs if o["kind"] == "Service"}
    seen = {"scheduler": 0, "worker": 0}
    sched_port = None
    for where, obj, c in k8s_containers():
        argv = container_argv(c, ep)
        if os.path.basename(argv[0]) != "dask":
            continue
        kind, params = _dask_params(argv)
        seen[kind] += 1
        if kind == "scheduler":
            sched_port = int(params["port"])
            # the Service that selects this pod must expose that port
            labels = obj["spec"]["template"]["metadata"]["labels"]
            svc = [s for s in services.values()
                   if s["spec"]["selector"].items() <= labels.items()]
            assert len(svc) == 1, f"{where}: expected one Service selecting the scheduler, got {len(svc)}"
            ports = {p["name"]: p["containerPort"] for p in c["ports"]}
            targets = {p["port"]: ports.get(p["targetPort"], p["targetPort"]) for p in svc[0]["spec"]["ports"]}
            assert targets.get(sched_port) == sched_port, f"{where}: Service does not expose {sched_port}"
            sched_name = svc[0]["metadata"]["name"]
        else:
            # memory: Dask's per-process limit times processes stays under the
            # container limit, and is not so far under that memory is wasted
            nworkers = int(params["n_workers"] or 1)
            limit = k8s_bytes(c["resources"]["limits"]["memory"])
            dask_limit = parse_bytes(params["memory_limit"]) * nworkers
            assert 0.75 * limit <= dask_limit < limit, (
                f"{where}: --memory-limit x --nworkers = {dask_limit:.3g} B against a container limit "
                f"of {limit:.3g} B; expected 75-100 %")
            assert k8s_bytes(c["resources"]["requests"]["memory"]) == limit, \
                f"{where}: a worker's memory request should equal its limit (no overcommit)"
            assert params["nthreads"] * nworkers == math.ceil(k8s_cpu(c["resources"]["requests"]["cpu"])), \
                f"{where}: --nthreads should match the CPU request"
            assert params["local_directory"] in {m["mountPath"] for m in c["volumeMounts"]}, \
                f"{where}: --local-directory must be a mounted volume (the root filesystem is read-only)"
            worker_sched = params["scheduler"]
    assert seen == {"scheduler": 1, "worker": 1}, seen
    assert worker_sched == f"tcp://{sched_name}:{sched_port}", worker_sched
    for _, _, argv in _subcommand_calls("build", "k8s/"):
        assert parse(argv).scheduler == worker_sched

    # compose: the same, by service name
    svcs = compose()["services"]
    sched = [n for n, s in svcs.items() if compose_argv(s, ep)[:2] == ["dask", "scheduler"]]
    assert len(sched) == 1
    port = int(_dask_params(compose_argv(svcs[sched[0]], ep))[1]["port"])
    workers = [n for n, s in svcs.items() if compose_argv(s, ep)[:2] == ["dask", "worker"]]
    assert len(workers) == 2, f"expected two compose workers, got {workers}"
    for n in workers:
        _, p = _dask_params(compose_argv(svcs[n], ep))
        assert p["scheduler"] == f"tcp://{sched[0]}:{port}", n
        assert parse_bytes(p["memory_limit"]) * int(p["n_workers"] or 1) < docker_bytes(svcs[n]["mem_limit"]), n
        assert sched[0] in svcs[n].get("depends_on", {}), n
    for _, _, argv in _subcommand_calls("build", "compose/"):
        assert parse(argv).scheduler == f"tcp://{sched[0]}:{port}"


def test_dask_parse_check_can_fail():
    import click

    with pytest.raises(click.exceptions.UsageError):
        _dask_params(["dask", "worker", "tcp://s:8786", "--memory-limitt", "1GiB"])
    with pytest.raises(click.exceptions.BadParameter):
        _dask_params(["dask", "worker", "tcp://s:8786", "--nthreads", "two"])
    assert k8s_bytes("8Gi") == 8 * 2 ** 30 and k8s_bytes("500M") == 5e8 and k8s_cpu("500m") == 0.5


# --------------------------------------------------------------------------- Kubernetes
def test_kustomization_lists_every_manifest():
    kz = yaml.safe_load((K8S / "kustomization.yaml").read_text())
    listed = set(kz["resources"])
    present = {p.name for p in K8S.glob("*.yaml")} - {"kustomization.yaml"}
    assert listed == present, f"kustomization resources {sorted(listed)} vs files {sorted(present)}"
    images = {i["name"]: i for i in kz.get("images", [])}
    assert images["sketchmerge"]["newTag"] == VERSION


def test_kustomize_renders_when_kubectl_is_available():
    kubectl = shutil.which("kubectl")
    if kubectl is None:
        pytest.skip("kubectl is not installed")
    r = subprocess.run([kubectl, "kustomize", str(K8S)], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    docs = [d for d in yaml.safe_load_all(r.stdout) if d]
    assert {d["kind"] for d in docs} >= {"Namespace", "ServiceAccount", "Deployment", "Service",
                                         "CronJob", "NetworkPolicy"}
    for d in docs:
        if d["kind"] != "Namespace":
            assert d["metadata"]["namespace"] == "sketchmerge", d["metadata"]["name"]
        ps = pod_spec(d)
        for c in (ps or {}).get("initContainers", []) + (ps or {}).get("containers", []):
            assert _image_tag(c["image"]) == VERSION, c["image"]


def _pod_failure_action(rules: list[dict], exit_codes: dict[str, int], conditions=()) -> str:
    """The action for a failed pod, per the Kubernetes batch/v1 API reference:
    rules are tried in order and the first that matches decides; exit code 0 is
    excluded from the check; In matches when some considered exit code is in
    the values, NotIn when some is not; a failure no rule matches counts
    towards backoffLimit."""
    for r in rules:
        if "onPodConditions" in r:
            if any(p["type"] in conditions and p.get("status", "True") == "True"
                   for p in r["onPodConditions"]):
                return r["action"]
            continue
        req = r["onExitCodes"]
        codes = [c for name, c in exit_codes.items()
                 if c != 0 and req.get("containerName") in (None, name)]
        vals = set(req["values"])
        if req["operator"] == "In" and any(c in vals for c in codes):
            return r["action"]
        if req["operator"] == "NotIn" and any(c not in vals for c in codes):
            return r["action"]
    return "Count"


def _cronjob() -> dict:
    cj = [o for _, o in k8s_objects() if o["kind"] == "CronJob"]
    assert len(cj) == 1, f"expected one CronJob, got {len(cj)}"
    return cj[0]


def test_cronjob_schedule_and_history():
    cj = _cronjob()["spec"]
    assert cj["concurrencyPolicy"] == "Forbid"
    assert isinstance(cj["startingDeadlineSeconds"], int) and cj["startingDeadlineSeconds"] > 0
    assert isinstance(cj["successfulJobsHistoryLimit"], int) and cj["successfulJobsHistoryLimit"] >= 1
    assert isinstance(cj["failedJobsHistoryLimit"], int) and cj["failedJobsHistoryLimit"] >= 1
    fields = cj["schedule"].split()
    assert len(fields) == 5, cj["schedule"]
    _check_cron_fields(fields, "CronJob")
    job = cj["jobTemplate"]["spec"]
    assert isinstance(job["backoffLimit"], int) and job["backoffLimit"] >= 1
    # the pod failure policy is only allowed with restartPolicy Never (API reference)
    assert job["template"]["spec"]["restartPolicy"] == "Never"


def test_cronjob_pod_failure_policy():
    job = _cronjob()["spec"]["jobTemplate"]["spec"]
    ps = job["template"]["spec"]
    rules = job["podFailurePolicy"]["rules"]
    names = {c["name"] for c in ps.get("initContainers", []) + ps["containers"]}
    # shape rules from the API reference: at most 20 rules, exactly one of the two
    # requirements per rule, known actions, sorted unique values, no 0 with In,
    # container names that exist in the pod
    assert len(rules) <= 20
    for r in rules:
        assert r["action"] in ("FailJob", "FailIndex", "Ignore", "Count"), r
        assert ("onExitCodes" in r) != ("onPodConditions" in r), r
        if "onExitCodes" in r:
            req = r["onExitCodes"]
            assert req["operator"] in ("In", "NotIn")
            assert req["values"] == sorted(set(req["values"])), req
            assert not (req["operator"] == "In" and 0 in req["values"]), req
            assert req.get("containerName") in names | {None}, req

    # which step is which: the init container builds, the main container diffs
    ep = image_entrypoint()
    step = {}
    for c in ps.get("initContainers", []) + ps["containers"]:
        subs = [a[0] for _, _, a in invocations(container_argv(c, ep), c["name"]) if a]
        step[subs[0] if subs else None] = c["name"]
    assert [c["name"] for c in ps["initContainers"]] == [step["build"]], "the build must run first"
    assert [c["name"] for c in ps["containers"]] == [step["diff"]]
    build, drift = step["build"], step["diff"]

    # the named rules hold exactly the codes of sketchmerge.cli.EXIT_CODES
    fail = [set(r["onExitCodes"]["values"]) for r in rules if r["action"] == "FailJob"
            and r.get("onExitCodes", {}).get("containerName") == build and r["onExitCodes"]["operator"] == "In"]
    count = [set(r["onExitCodes"]["values"]) for r in rules if r["action"] == "Count"
             and r.get("onExitCodes", {}).get("containerName") == build]
    assert fail == [BAD_INPUT], f"build FailJob codes: expected {sorted(BAD_INPUT)}, got {fail}"
    assert count == [TRANSIENT], f"build retried codes: expected {sorted(TRANSIENT)}, got {count}"

    # and the policy as a whole does what the README's table says
    act = lambda codes, cond=(): _pod_failure_action(rules, codes, cond)  # noqa: E731
    for code in sorted(BAD_INPUT):
        assert act({build: code}) == "FailJob", code
    for code in sorted(TRANSIENT):
        assert act({build: code}) == "Count", code
        assert act({build: 0, drift: code}) == "Count", code
    for code in (EXIT_CODES["internal"], EXIT_CODES["verify_failed"], 137):
        assert act({build: code}) == "FailJob", code
    assert act({build: 0, drift: EXIT_CODES["drift"]}) == "FailJob"
    assert act({build: 137}, ("DisruptionTarget",)) == "Ignore"


def test_pod_failure_evaluation_can_fail():
    # a policy that retries bad input must be caught by the evaluator
    rules = [{"action": "Count", "onExitCodes": {"containerName": "build", "operator": "In", "values": [3]}}]
    assert _pod_failure_action(rules, {"build": 3}) == "Count"
    assert _pod_failure_action(rules, {"build": 0, "drift": 3}) == "Count"  # unmatched: counted
    rules = [{"action": "FailJob", "onExitCodes": {"operator": "NotIn", "values": [5]}}]
    assert _pod_failure_action(rules, {"build": 0, "drift": 5}) == "Count"  # 0 is excluded
    assert _pod_failure_action(rules, {"build": 0, "drift": 4}) == "FailJob"


def test_pods_run_unprivileged_with_resources():
    for fname, obj in k8s_objects():
        ps = pod_spec(obj)
        if ps is None:
            continue
        where = f"{fname}:{obj['metadata']['name']}"
        sc = ps["securityContext"]
        assert sc["runAsNonRoot"] is True and sc["runAsUser"] > 0, where
        assert sc["seccompProfile"]["type"] == "RuntimeDefault", where
        assert ps["automountServiceAccountToken"] is False, where
        assert not ps.get("hostNetwork") and not ps.get("hostPID") and not ps.get("hostIPC"), where
        vols = {v["name"]: v for v in ps.get("volumes", [])}
        assert all("hostPath" not in v for v in vols.values()), where
        # every pod carries the label the NetworkPolicy lets in
        assert pod_template(obj)["metadata"]["labels"]["app.kubernetes.io/part-of"] == "sketchmerge", where
        for c in ps.get("initContainers", []) + ps["containers"]:
            w = f"{where}/{c['name']}"
            csc = c["securityContext"]
            assert csc["allowPrivilegeEscalation"] is False, w
            assert csc["readOnlyRootFilesystem"] is True, w
            assert "ALL" in csc["capabilities"]["drop"], w
            assert not csc.get("privileged"), w
            assert _image_tag(c["image"]) == VERSION, f"{w}: image {c['image']}, expected tag {VERSION}"
            res = c["resources"]
            assert {"cpu", "memory"} <= set(res["requests"]), w
            assert k8s_bytes(res["limits"]["memory"]) >= k8s_bytes(res["requests"]["memory"]), w
            # a read-only root filesystem needs a writable /tmp
            mounts = {m["mountPath"]: m["name"] for m in c.get("volumeMounts", [])}
            assert "/tmp" in mounts and "emptyDir" in vols[mounts["/tmp"]], w


def test_network_policy_covers_every_pod():
    pol = [o for _, o in k8s_objects() if o["kind"] == "NetworkPolicy"]
    assert len(pol) == 1
    sel = pol[0]["spec"]["podSelector"]["matchLabels"]
    assert sel == {"app.kubernetes.io/part-of": "sketchmerge"}
    assert pol[0]["spec"]["ingress"][0]["from"][0]["podSelector"]["matchLabels"] == sel
    ns = [o for _, o in k8s_objects() if o["kind"] == "Namespace"]
    assert ns and ns[0]["metadata"]["labels"]["pod-security.kubernetes.io/enforce"] == "restricted"


def test_credentials_come_from_secret_references():
    for where, _, c in k8s_containers():
        for e in c.get("env", []):
            if _credential_name(e["name"]):
                assert "valueFrom" in e and "value" not in e, f"{where}: {e['name']} set inline"
        for ef in c.get("envFrom", []):
            assert set(ef) <= {"secretRef", "configMapRef", "prefix"}, where
    # whoever touches object storage gets the credentials: the build, the drift step
    # and the workers (they read the source and write cached summaries)
    for where, _, c in k8s_containers():
        if "scheduler" in where:
            continue
        assert any(ef.get("secretRef", {}).get("name") == "sketchmerge-s3" for ef in c.get("envFrom", [])), where
    assert not [o for _, o in k8s_objects() if o["kind"] == "Secret"], \
        "no Secret manifest: the README creates it with kubectl"


# --------------------------------------------------------------------------- compose
def test_compose_ports_bind_to_localhost_only():
    svcs = compose()["services"]
    seen = 0
    for name, s in svcs.items():
        assert s.get("network_mode") != "host" and not s.get("privileged"), name
        for p in s.get("ports", []):
            seen += 1
            if isinstance(p, dict):
                assert p.get("host_ip") == "127.0.0.1", f"{name}: {p}"
            else:
                assert str(p).startswith("127.0.0.1:") and str(p).count(":") == 2, \
                    f"{name}: expected 127.0.0.1:HOST:CONTAINER, got {p!r}"
    assert seen >= 2


def test_port_check_can_fail():
    for bad in ("5000:5000", "0.0.0.0:8787:8787", "8787"):
        assert not (bad.startswith("127.0.0.1:") and bad.count(":") == 2)


def test_compose_services():
    c = compose()
    svcs = c["services"]
    ep = image_entrypoint()
    ours = {n: s for n, s in svcs.items() if _is_sketchmerge_image(s.get("image", ""))}
    assert {"scheduler", "worker-1", "worker-2", "seed", "nightly"} <= set(ours)
    for n, s in ours.items():
        assert _image_tag(s["image"]) == VERSION, f"{n}: image {s['image']}, expected tag {VERSION}"
        assert s.get("read_only") is True and "ALL" in s.get("cap_drop", []), n
        assert "no-new-privileges:true" in s.get("security_opt", []), n
        ctx = (COMPOSE.parent / s["build"]["context"]).resolve()
        assert (ctx / "pyproject.toml").is_file() and (ctx / s["build"]["dockerfile"]).resolve() == DOCKERFILE
        for f in _as_words(s.get("env_file")):
            assert (COMPOSE.parent / f).is_file(), f"{n}: env_file {f} missing"
        deps = s.get("depends_on", {})
        for d in deps:
            assert d in svcs, f"{n} depends on unknown service {d}"
    assert ours["nightly"]["depends_on"]["seed"]["condition"] == "service_completed_successfully"
    store = [s for s in svcs.values() if s.get("image", "").startswith("motoserver/moto:")]
    assert store and _image_tag(store[0]["image"]) not in (None, "latest"), "pin the store's image"
    assert compose_argv(ours["seed"], ep)[:2] == ["python", "-c"]


def _trial_env(**override) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith(("AWS_", "DASK_", "SKETCHMERGE_"))}
    for line in (COMPOSE.parent / "local-trial.env").read_text().splitlines():
        if line.strip() and not line.lstrip().startswith("#"):
            k, _, v = line.partition("=")
            env[k.strip()] = v.strip()
    env.update(override)
    return env


def _run_cli(argv: list[str], env: dict, timeout: float = 240) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "sketchmerge.cli", *argv], env=env, capture_output=True,
                          text=True, timeout=timeout)


def test_compose_seed_and_nightly_run_against_a_local_s3_store(s3_server, s3_options, tmp_path):
    """The seed script and the nightly build, exactly as written in the compose file
    (bucket and scheduler swapped for the test's), against moto on 127.0.0.1."""
    import uuid

    import numpy as np
    import pyarrow.dataset as ds
    import s3fs

    s3_bucket = "sm-" + uuid.uuid4().hex[:12]  # not created here: the seed script creates it

    svcs = compose()["services"]
    ep = image_entrypoint()
    seed = compose_argv(svcs["seed"], ep)
    code = seed[2]
    compile(code, "compose:seed", "exec")
    trial_bucket = _trial_env()["TRIAL_BUCKET"]
    per_day = 1500
    env = _trial_env(AWS_ENDPOINT_URL=s3_server, TRIAL_BUCKET=s3_bucket, TRIAL_ROWS_PER_DAY=str(per_day),
                     TMPDIR=str(tmp_path))
    days = int(env["TRIAL_DAYS"])

    def seed_run(n_days):
        r = subprocess.run([sys.executable, "-c", code], env=dict(env, TRIAL_DAYS=str(n_days)),
                           capture_output=True, text=True, timeout=120)
        assert r.returncode == 0, r.stderr

    nightly = compose_argv(svcs["nightly"], ep)
    assert nightly[0] == "sketchmerge"
    argv = [a.replace(f"s3://{trial_bucket}/", f"s3://{s3_bucket}/") for a in nightly[1:]]
    i = argv.index("--scheduler")
    argv[i:i + 2] = ["--workers", "2"]  # an embedded cluster instead of the compose one
    args = parse(argv)
    assert args.source.startswith(f"s3://{s3_bucket}/")

    seed_run(days)
    r = _run_cli(argv + ["--json"], env)
    assert r.returncode == 0, r.stderr
    first = json.loads(r.stdout)
    assert first["changed"] and first["rows"] == days * per_day

    # independent reference: pyarrow reads the uploaded objects back
    fs = s3fs.S3FileSystem(**s3_options)
    data = ds.dataset(args.source.removeprefix("s3://"), filesystem=fs, format="parquet",
                      partitioning="hive").to_table()
    assert data.num_rows == days * per_day
    cuts = sketchmerge.load(args.out, storage_options=s3_options)
    lux = data.column("light_lux").to_numpy()
    assert cuts.feature("light_lux").info()["max"] == float(np.max(lux))
    assert cuts.feature("light_lux").info()["min"] == float(np.min(lux))

    # the first night: one version, so the drift step's "no input" is not an alert
    # when run the way the CronJob's drift container runs it
    drift = compose_argv(svcs["drift"], ep)
    assert drift[0] == "sketchmerge"
    diff = [a.replace(f"s3://{trial_bucket}/", f"s3://{s3_bucket}/") for a in drift[1:]]
    assert parse(diff).table == args.out
    (_, k8s_prefix, _), = _subcommand_calls("diff", "k8s/")
    assert os.path.basename(k8s_prefix[0]) == "sketchmerge-run"
    wrapped = subprocess.run(["sh", str(RUNNER), *k8s_prefix[1:], sys.executable, "-m", "sketchmerge.cli", *diff],
                             env=env, capture_output=True, text=True, timeout=120)
    assert wrapped.returncode == 0, wrapped.stderr
    # the first night: the CLI itself reports "nothing to compare with yet" and exits 0
    # (the wrapper's --ok-status 4 stays as a guard for older images)
    assert "only one version is published" in wrapped.stdout, wrapped.stdout + wrapped.stderr

    # one more day: the earlier days' objects are rewritten byte for byte, so the
    # refresh sketches only the new day's units
    seed_run(days + 1)
    r = _run_cli(argv + ["--json"], env)
    assert r.returncode == 0, r.stderr
    second = json.loads(r.stdout)
    assert second["rows"] == (days + 1) * per_day
    assert second["partitions_reused"] == first["partitions_total"]
    assert second["partitions_sketched"] == second["partitions_total"] - first["partitions_total"] > 0

    # now there are two versions: the drift step's exit code follows its own report
    r = _run_cli(diff + ["--json"], env)
    rep = json.loads(r.stdout)
    over = [f["name"] for f in rep["features"] if f["psi"] > 0.25]
    assert r.returncode == (EXIT_CODES["drift"] if over else 0), r.stderr


# --------------------------------------------------------------------------- versions and image
def test_versions_agree():
    assert VERSION == sketchmerge.__version__
    labels = " ".join(rest for ins, rest in _dockerfile() if ins == "LABEL")
    m = re.search(r'org\.opencontainers\.image\.version="([^"]+)"', labels)
    assert m and m.group(1) == VERSION
    refs = [c["image"] for _, _, c in k8s_containers()]
    refs += [s["image"] for s in compose()["services"].values() if "image" in s]
    ours = [r for r in refs if _is_sketchmerge_image(r)]
    assert len(ours) >= 6
    assert {_image_tag(r) for r in ours} == {VERSION}, ours
    # the README's build command tags the image with the version too
    readme = (DEPLOY / "README.md").read_text()
    assert f"-t sketchmerge:{VERSION} ." in readme


def test_dockerfile():
    from packaging.specifiers import SpecifierSet
    from packaging.version import Version

    ins = _dockerfile()
    froms = [rest for i, rest in ins if i == "FROM"]
    assert len(froms) == 1, froms
    m = re.fullmatch(r"python:(\d+\.\d+)(?:\.\d+)?-slim(?:-\w+)?(?:@sha256:[0-9a-f]{64})?(?: AS \w+)?", froms[0],
                     re.IGNORECASE)
    assert m, f"expected a python:X.Y-slim base, got {froms[0]!r}"
    requires = _pyproject()["project"]["requires-python"]
    assert Version(m.group(1)) in SpecifierSet(requires), f"python {m.group(1)} vs requires-python {requires}"
    users = [rest for i, rest in ins if i == "USER"]
    assert users and re.fullmatch(r"[1-9]\d*(:[1-9]\d*)?", users[-1]), f"expected a numeric non-root USER, got {users}"
    assert image_entrypoint() == ["sketchmerge"]
    runs = " ".join(rest for i, rest in ins if i == "RUN")
    assert re.search(r"pip install --constraint (\S+) \"\.\[s3\]\"", runs), runs
    # every COPY source exists and passes the build-context filter (else the build fails)
    allowed = [l[1:].rstrip("/") for l in (DOCKERFILE.parent / "Dockerfile.dockerignore").read_text().splitlines()
               if l.startswith("!")]
    copied = []
    for i, rest in ins:
        if i != "COPY":
            continue
        words = [w for w in rest.split() if not w.startswith("--")]
        for src in words[:-1]:
            src = src.rstrip("/")
            assert (ROOT / src).exists(), f"COPY {src}: not in the repository"
            assert any(src == a or src.startswith(a + "/") for a in allowed), f"COPY {src}: excluded from the context"
            copied.append(src)
    assert "deploy/docker/constraints.txt" in copied and "pyproject.toml" in copied


def test_constraints_pin_every_dependency_within_pyproject():
    from packaging.requirements import Requirement
    from packaging.utils import canonicalize_name
    from packaging.version import Version

    pins = {}
    for line in CONSTRAINTS.read_text().splitlines():
        s = line.split("#", 1)[0].strip()
        if not s:
            continue
        m = re.fullmatch(r"([A-Za-z0-9_.-]+)==([0-9][0-9A-Za-z.+-]*)", s)
        assert m, f"constraints.txt: expected NAME==VERSION, got {s!r}"
        name = canonicalize_name(m.group(1))
        assert name not in pins, f"constraints.txt: {name} pinned twice"
        pins[name] = Version(m.group(2))
    proj = _pyproject()["project"]
    reqs = [Requirement(r) for r in proj["dependencies"] + proj["optional-dependencies"]["s3"]]
    for r in reqs:
        name = canonicalize_name(r.name)
        assert name in pins, f"constraints.txt: {name} is not pinned"
        assert pins[name] in r.specifier, f"constraints.txt: {name}=={pins[name]} outside pyproject's {r.specifier}"
    assert "sketchmerge" not in pins  # a local path install cannot be constrained


# --------------------------------------------------------------------------- credentials
_CRED_NAME = re.compile(r"(SECRET|PASSWORD|PASSWD|TOKEN|ACCESS_KEY|PRIVATE_KEY|CREDENTIAL|API_KEY)", re.I)
_PLACEHOLDER = re.compile(r"(placeholder|replace|example|changeme|<[^>]*>)", re.I)


def _credential_name(name: str) -> bool:
    return bool(_CRED_NAME.search(name))


def _is_reference(value: str) -> bool:
    v = value.strip().strip("'\"")
    return v == "" or v.startswith(("$", "%s", "<")) or bool(_PLACEHOLDER.search(v))


def credential_findings(text: str, where: str) -> list[str]:
    found = []
    # AWS access key ids: a four-letter prefix and 16 upper-case letters or digits
    # (common practice for secret scanners)
    for m in re.finditer(r"(?<![A-Z0-9])(AKIA|ASIA|AGPA|AIDA|AROA|ANPA)[A-Z0-9]{16}(?![A-Z0-9])", text):
        found.append(f"{where}: looks like an AWS access key id: {m.group(0)[:4]}...")
    # a 40-character secret-key-shaped token mixing cases and digits
    for m in re.finditer(r"(?<![A-Za-z0-9/+=])[A-Za-z0-9/+]{40}(?![A-Za-z0-9/+=])", text):
        t = m.group(0)
        if re.search(r"[a-z]", t) and re.search(r"[A-Z]", t) and re.search(r"\d", t):
            found.append(f"{where}: looks like a secret access key: {t[:4]}...")
    if re.search(r"-----BEGIN [A-Z ]*PRIVATE KEY-----", text):
        found.append(f"{where}: a private key block")
    # NAME=VALUE or NAME: VALUE with a credential-like name and a literal value
    for m in re.finditer(r"\b([A-Za-z0-9_]+)[ \t]*[=:][ \t]*(\"[^\"\n]*\"|'[^'\n]*'|[^\s#]+)?", text):
        name, value = m.group(1), m.group(2) or ""
        if _credential_name(name) and not _is_reference(value) and name.upper() == name:
            found.append(f"{where}: {name} has a literal value")
    return found


def test_no_credentials_in_deploy():
    bad = []
    files = [p for p in sorted(DEPLOY.rglob("*")) if p.is_file()]
    for p in files:
        bad += credential_findings(p.read_text(), str(p.relative_to(DEPLOY)))
    # structured: compose environment and env files, k8s Secret data
    for name, s in compose()["services"].items():
        env = s.get("environment", {})
        items = env.items() if isinstance(env, dict) else [tuple((e.split("=", 1) + [""])[:2]) for e in env]
        for k, v in items:
            if _credential_name(k) and not _is_reference(str(v or "")):
                bad.append(f"compose/{name}: {k} has a literal value")
    for p in [COMPOSE.parent / "local-trial.env", SINGLE / "nightly.env.example"]:
        for line in p.read_text().splitlines():
            k, eq, v = line.partition("=")
            if eq and not k.lstrip().startswith("#") and _credential_name(k) and not _PLACEHOLDER.search(v):
                bad.append(f"{p.name}: {k} is not an obvious placeholder")
    assert not bad, "\n".join(bad)


def test_credential_scan_can_fail():
    fake_id = "AKIA" + "Z7Q2" * 4          # built here so that no file holds the shape
    fake_secret = "Ab1/" * 10             # secret-key shaped: 40 chars, mixed case and digits
    assert credential_findings(f"key: {fake_id}", "t")
    assert credential_findings(f"x = '{fake_secret}'", "t")
    assert credential_findings("AWS_SECRET_ACCESS_KEY=abcd1234efgh", "t")
    assert not credential_findings("AWS_SECRET_ACCESS_KEY=REPLACE-WITH-SECRET-ACCESS-KEY", "t")
    assert not credential_findings('AWS_ACCESS_KEY_ID=%s\\n', "t")
    assert not credential_findings("AWS_SECRET_ACCESS_KEY: ${AWS_SECRET_ACCESS_KEY}", "t")


# --------------------------------------------------------------------------- single host
_CRON_RANGES = [(0, 59), (0, 23), (1, 31), (1, 12), (0, 7)]


def _check_cron_fields(fields: list[str], where: str) -> None:
    """Standard five-field cron syntax (crontab(5)): lists, ranges, steps, '*'."""
    for f, (lo, hi) in zip(fields, _CRON_RANGES):
        for part in f.split(","):
            m = re.fullmatch(r"(\*|(\d+)(?:-(\d+))?)(?:/(\d+))?", part)
            assert m, f"{where}: bad cron field {f!r}"
            for g in (m.group(2), m.group(3)):
                if g is not None:
                    assert lo <= int(g) <= hi, f"{where}: {g} outside {lo}-{hi} in {f!r}"
            if m.group(4) is not None:
                assert int(m.group(4)) > 0, f"{where}: step 0 in {f!r}"


def test_cron_file():
    p = SINGLE / "sketchmerge-nightly.cron"
    jobs = _cron_jobs(p)
    assert len(jobs) == 1
    fields, user, cmd = jobs[0]
    _check_cron_fields(fields, p.name)
    assert user != "root", "the job runs as its own unprivileged user"
    words = shlex.split(cmd)
    assert "flock" in words and words[words.index("flock") + 1] == "-n", "expected flock -n for non-overlap"
    assert words[0] == "systemd-cat", "expected the output in the journal (systemd-cat)"
    calls = shell_invocations(cmd, p.name)
    assert [a[0] for _, _, a in calls] == ["build", "diff"]
    for _, prefix, argv in calls:
        # every call goes through the retry wrapper with the credentials file
        assert os.path.basename(prefix[0]) == "sketchmerge-run" and "--env-file" in prefix, prefix
    assert "--ok-status" in calls[1][1] and calls[1][1][calls[1][1].index("--ok-status") + 1] == "4"
    assert "--ok-status" not in calls[0][1], "the build's 'no input' is a real failure"
    assert "." not in "sketchmerge-nightly", "cron skips cron.d names with dots"
    env = dict(l.split("=", 1) for l in p.read_text().splitlines() if re.match(r"^[A-Z_]+=", l))
    assert "/opt/sketchmerge/venv/bin" in env["PATH"].split(":")


def test_systemd_units():
    svc = _unit(SINGLE / "sketchmerge-nightly.service")
    get = lambda sec, k: [v for s, kk, v in svc if s == sec and kk == k]  # noqa: E731
    assert get("Service", "Type") == ["oneshot"]
    assert get("Service", "User") and get("Service", "User") != ["root"]
    assert get("Service", "EnvironmentFile") == ["/etc/sketchmerge/nightly.env"]
    assert get("Service", "Restart") in ([], ["no"]), "retries belong to sketchmerge-run only"
    execs = [shlex.split(v) for v in get("Service", "ExecStart")]
    calls = [invocations(w, "service")[0] for w in execs]
    assert [a[0] for _, _, a in calls] == ["build", "diff"]
    for _, prefix, argv in calls:
        assert os.path.basename(prefix[0]) == "sketchmerge-run" and prefix[0].startswith("/"), prefix
    assert "--ok-status" in calls[1][1] and "--ok-status" not in calls[0][1]
    assert get("Service", "SyslogIdentifier") == ["sketchmerge-nightly"]

    tim = _unit(SINGLE / "sketchmerge-nightly.timer")
    tget = lambda sec, k: [v for s, kk, v in tim if s == sec and kk == k]  # noqa: E731
    assert tget("Timer", "Unit") == ["sketchmerge-nightly.service"]
    assert tget("Timer", "Persistent") == ["true"]
    assert tget("Install", "WantedBy") == ["timers.target"]
    sa = shutil.which("systemd-analyze")
    if sa:
        r = subprocess.run([sa, "calendar", tget("Timer", "OnCalendar")[0]], capture_output=True, text=True)
        assert r.returncode == 0, r.stderr


def test_systemd_analyze_verify(tmp_path):
    sa = shutil.which("systemd-analyze")
    if sa is None:
        pytest.skip("systemd-analyze is not installed")
    # verify checks that executables, users and files exist: point those at ones
    # that do, keep every other line as written
    env_file = tmp_path / "nightly.env"
    env_file.write_text("A=1\n")
    user, group = getpass.getuser(), grp.getgrgid(os.getgid()).gr_name
    sh = shutil.which("sh")
    text = (SINGLE / "sketchmerge-nightly.service").read_text()
    text = re.sub(r"^ExecStart=\S+", f"ExecStart={sh}", text, flags=re.M)
    text = re.sub(r"^User=.*$", f"User={user}", text, flags=re.M)
    text = re.sub(r"^Group=.*$", f"Group={group}", text, flags=re.M)
    text = re.sub(r"^EnvironmentFile=.*$", f"EnvironmentFile={env_file}", text, flags=re.M)
    (tmp_path / "sketchmerge-nightly.service").write_text(text)
    shutil.copy(SINGLE / "sketchmerge-nightly.timer", tmp_path)
    r = subprocess.run([sa, "verify", "sketchmerge-nightly.service", "sketchmerge-nightly.timer"],
                       cwd=tmp_path, capture_output=True, text=True, timeout=60)
    complaints = [l for l in r.stderr.splitlines()
                  if re.search(r"unknown|invalid|failed to parse|ignoring|not allowed|bad", l, re.I)]
    assert r.returncode == 0 and not complaints, r.stderr


# --------------------------------------------------------------------------- the retry wrapper
def _stub(tmp_path: Path, codes: list[int]) -> Path:
    """A command that records each call and its environment, then exits with the next code."""
    (tmp_path / "codes").write_text("\n".join(map(str, codes)) + "\n")
    stub = tmp_path / "stub"
    stub.write_text('#!/bin/sh\n'
                    'd=$(dirname "$0")\n'
                    'echo "$*" >> "$d/calls"\n'
                    'n=$(wc -l < "$d/calls")\n'
                    'env > "$d/env.$n"\n'
                    'code=$(sed -n "${n}p" "$d/codes")\n'
                    'exit "${code:-0}"\n')
    stub.chmod(0o755)
    return stub


def _runner(tmp_path, *args, env=None) -> tuple[int, int, str]:
    r = subprocess.run(["sh", str(RUNNER), "--delay", "0", *args], capture_output=True, text=True,
                       timeout=60, env=env)
    calls = tmp_path / "calls"
    n = len(calls.read_text().splitlines()) if calls.exists() else 0
    return r.returncode, n, r.stderr


def test_runner_is_valid_executable_shell():
    assert os.access(RUNNER, os.X_OK), "deploy/bin/sketchmerge-run must be executable"
    assert RUNNER.read_text().startswith("#!/bin/sh\n")
    r = subprocess.run(["sh", "-n", str(RUNNER)], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr


@pytest.mark.parametrize("code", sorted(set(range(0, 12)) | {130, 137}))
def test_runner_retries_only_transient_codes(tmp_path, code):
    stub = _stub(tmp_path, [code, 0])
    rc, calls, err = _runner(tmp_path, "--attempts", "3", "--", str(stub), "build", "x")
    if code in TRANSIENT:
        assert (rc, calls) == (0, 2), err
        assert f"exited {code}" in err
    else:
        assert (rc, calls) == (code, 1), err


def test_runner_gives_up_after_its_attempts(tmp_path):
    stub = _stub(tmp_path, [EXIT_CODES["storage"], EXIT_CODES["scheduler"], EXIT_CODES["race"]])
    rc, calls, err = _runner(tmp_path, "--attempts", "3", "--", str(stub))
    assert (rc, calls) == (EXIT_CODES["race"], 3)
    assert "giving up" in err


def test_runner_ok_status(tmp_path):
    stub = _stub(tmp_path, [EXIT_CODES["no_input"]])
    assert _runner(tmp_path, "--ok-status", "4", "--", str(stub))[:2] == (0, 1)
    (tmp_path / "calls").unlink()
    stub = _stub(tmp_path, [EXIT_CODES["bad_input"]])
    assert _runner(tmp_path, "--ok-status", "4", "--", str(stub))[:2] == (EXIT_CODES["bad_input"], 1)


def test_runner_usage_errors(tmp_path):
    stub = _stub(tmp_path, [0])
    for args in (["--attempts", "0", "--", str(stub)], ["--attempts", "x", str(stub)], ["--bogus", str(stub)],
                 ["--"], ["--ok-status", "four", str(stub)]):
        rc, calls, err = _runner(tmp_path, *args)
        assert (rc, calls) == (2, 0), (args, err)
        assert err.startswith("sketchmerge-run: ")


def test_runner_env_file(tmp_path):
    stub = _stub(tmp_path, [0])
    secret_value = "do-not-print-" + "x" * 8
    f = tmp_path / "nightly.env"
    f.write_text("# comment\n\n"
                 f'AWS_SECRET_ACCESS_KEY="{secret_value}"\n'
                 "  INDENTED=yes\n"
                 "WITH_EQUALS=a=b\n"
                 "SINGLE='q v'\n")
    f.chmod(0o600)
    rc, calls, err = _runner(tmp_path, "--env-file", str(f), "--", str(stub))
    assert (rc, calls) == (0, 1), err
    seen = dict(l.split("=", 1) for l in (tmp_path / "env.1").read_text().splitlines() if "=" in l)
    assert seen["AWS_SECRET_ACCESS_KEY"] == secret_value
    assert seen["INDENTED"] == "yes" and seen["WITH_EQUALS"] == "a=b" and seen["SINGLE"] == "q v"
    f.chmod(0o640)
    (tmp_path / "calls").unlink()
    assert _runner(tmp_path, "--env-file", str(f), "--", str(stub))[:2] == (0, 1)
    # readable by others, or writable by the group: refused before running anything
    for mode in (0o644, 0o660, 0o604):
        f.chmod(mode)
        (tmp_path / "calls").unlink(missing_ok=True)
        rc, calls, err = _runner(tmp_path, "--env-file", str(f), "--", str(stub))
        assert (rc, calls) == (2, 0), (oct(mode), err)
        assert "chmod 0600" in err
    # a malformed line is named by number, its value never printed
    f.write_text(f"GOOD=1\nnot a pair {secret_value}\n")
    f.chmod(0o600)
    rc, calls, err = _runner(tmp_path, "--env-file", str(f), "--", str(stub))
    assert (rc, calls) == (2, 0) and ":2:" in err and secret_value not in err


# --------------------------------------------------------------------------- README
def test_readme_describes_every_file_and_the_policy():
    text = (DEPLOY / "README.md").read_text()
    for p in sorted(DEPLOY.rglob("*")):
        if p.is_file() and p.name != "README.md":
            assert p.name in text or p.relative_to(DEPLOY).as_posix() in text, f"README.md does not mention {p.name}"
    assert "same access rules as the source" in text
    # the exit-code table has a row for every code the CLI defines
    rows = {int(m.group(1)) for m in re.finditer(r"^\| (\d+) \|", text, re.M)}
    assert rows >= set(EXIT_CODES.values()) - {EXIT_CODES["internal"], EXIT_CODES["verify_failed"]}
