"""Deployment files: what can be checked without a Docker engine, a cluster or systemd.

None of these files is run here. The tests parse them and check that they fit together: the image's command reads
/etc/jointstat/node.yaml, every runner puts the config exactly there, every file the config names is mounted (keys
read-only, state writable), no node is given another node's private keys, and ports, probes and peers agree.
"""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path, PurePosixPath
from typing import Any

import pytest
import yaml
from jointstat.cli import build_parser
from jointstat.node.config import NodeConfig, load_node_config, parse_node_config
from jointstat.node.keys import CA_KEY, signing_key_file, tls_key_file

REPO = Path(__file__).resolve().parents[1]
DEPLOY = REPO / "deploy"
NODES = ("teal-valley-weather", "saltmarsh-gauges")


# -- small readers ---------------------------------------------------------------------------------------------------


def dockerfile() -> list[tuple[str, str]]:
    """(instruction, arguments) pairs, continuation lines joined, comments dropped."""
    lines, current = [], ""
    for raw in (DEPLOY / "Dockerfile").read_text(encoding="utf-8").splitlines():
        if not current and (not raw.strip() or raw.lstrip().startswith("#")):
            continue
        current += raw.rstrip()
        if current.endswith("\\"):
            current = current[:-1] + " "
            continue
        word, _, rest = current.strip().partition(" ")
        lines.append((word.upper(), rest.strip()))
        current = ""
    return lines


def instruction(name: str) -> list[str]:
    return [args for word, args in dockerfile() if word == name]


def image_command() -> list[str]:
    (entrypoint,) = instruction("ENTRYPOINT")
    (cmd,) = instruction("CMD")
    return json.loads(entrypoint) + json.loads(cmd)


def config_path_of(argv: list[str]) -> str:
    assert argv.count("--config") == 1
    return argv[argv.index("--config") + 1]


IMAGE_CONFIG = "/etc/jointstat/node.yaml"


def config_files(config: NodeConfig) -> dict[str, Path]:
    """Every file a node config names, by field path."""
    files = {
        "tls.certificate": config.tls.certificate,
        "tls.private_key": config.tls.private_key,
        "signing_key": config.signing_key,
    }
    if config.key_hashing_secret is not None:
        files["key_hashing_secret"] = config.key_hashing_secret
    for i, peer in enumerate(config.peers):
        files[f"peers[{i}].certificate"] = peer.certificate
        files[f"peers[{i}].signing_public_key"] = peer.signing_public_key
    for i, job in enumerate(config.jobs):
        files[f"jobs[{i}].manifest"] = job.manifest
        if job.input.csv is not None:
            files[f"jobs[{i}].input.csv.path"] = job.input.csv.path
    return files


def writable_paths(config: NodeConfig) -> list[Path]:
    node = config.node
    return [node.data_dir, node.job_store, node.session_log, node.results_dir] + [
        j.results for j in config.jobs
    ]


def under(path: Path | PurePosixPath, mount: str) -> bool:
    return PurePosixPath(path) == PurePosixPath(mount) or PurePosixPath(mount) in PurePosixPath(path).parents


def covering(path: Path, mounts: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """The innermost mount holding ``path``."""
    holders = [target for target in mounts if under(path, target)]
    assert holders, f"{path} is not inside any mount"
    return mounts[max(holders, key=len)]


# -- the image -----------------------------------------------------------------------------------------------------


def test_the_image_runs_the_node_with_the_config_at_etc_jointstat_node_yaml() -> None:
    assert image_command() == ["jointstat", "node", "run", "--config", IMAGE_CONFIG]
    assert config_path_of(image_command()) == IMAGE_CONFIG


def test_the_image_is_python_3_11_slim_running_as_a_non_root_user_with_a_state_volume() -> None:
    assert [args.split()[0] for args in instruction("FROM")] == ["python:3.11-slim", "python:3.11-slim"]
    *_, user = instruction("USER")
    assert user.split(":")[0] not in ("0", "root")
    assert json.loads(instruction("VOLUME")[0]) == ["/var/lib/jointstat"]
    assert instruction("STOPSIGNAL") == ["SIGTERM"]


def test_the_image_installs_the_package_with_the_pinned_constraints() -> None:
    (run,) = [r for r in instruction("RUN") if "pip install" in r]
    words = shlex.split(run.split("pip install", 1)[1].split("&&")[0])
    assert words[words.index("-c") + 1] == "constraints.txt" and words[-1] == "."


def test_the_build_context_admits_only_what_the_image_copies_and_never_var() -> None:
    rules = [
        line.strip()
        for line in (DEPLOY / "Dockerfile.dockerignore").read_text(encoding="utf-8").splitlines()
        if line.strip() and not line.startswith("#")
    ]
    assert rules[0] == "*"
    admitted = {rule[1:] for rule in rules if rule.startswith("!")}
    copied = set()
    for args in instruction("COPY"):
        if args.startswith("--from="):
            continue
        *sources, _ = args.split()
        copied.update(sources)
    assert copied <= admitted
    assert all((REPO / name).exists() for name in copied)
    assert not any(name.startswith(("var", ".venv", ".git")) for name in admitted)


def test_node_check_accepts_the_same_config_option_as_the_image_command() -> None:
    args = build_parser().parse_args(["node", "check", "--config", IMAGE_CONFIG])
    assert args.config == IMAGE_CONFIG


# -- compose ---------------------------------------------------------------------------------------------------------


def compose() -> dict[str, Any]:
    return yaml.safe_load((DEPLOY / "compose.yaml").read_text(encoding="utf-8"))


def compose_mounts(service: dict[str, Any]) -> dict[str, dict[str, Any]]:
    mounts = {}
    for volume in service["volumes"]:
        assert volume["type"] == "bind"
        mounts[volume["target"]] = volume
    return mounts


def compose_config(name: str) -> NodeConfig:
    service = compose()["services"][name]
    mount = compose_mounts(service)[IMAGE_CONFIG]
    return load_node_config(DEPLOY / mount["source"])


def test_compose_runs_exactly_the_two_example_nodes_on_one_network() -> None:
    services = compose()["services"]
    assert set(services) == set(NODES)
    for service in services.values():
        assert service["image"] == "jointstat:0.1.0" and service["build"]["dockerfile"] == "deploy/Dockerfile"
        assert (DEPLOY / service["build"]["context"] / service["build"]["dockerfile"]).is_file()
        assert "command" not in service and "entrypoint" not in service  # the image's own command
        assert service["networks"] == ["trial"]
        assert service["read_only"] is True and service["cap_drop"] == ["ALL"]
        assert service["stop_signal"] == "SIGTERM"


@pytest.mark.parametrize("name", NODES)
def test_each_compose_node_gets_its_config_at_the_path_the_image_command_reads(name: str) -> None:
    mount = compose_mounts(compose()["services"][name])[config_path_of(image_command())]
    assert mount["read_only"] is True
    config = compose_config(name)
    assert config.node.name == name
    assert config.node.data_dir == Path("/var/lib/jointstat")


@pytest.mark.parametrize("name", NODES)
def test_every_file_a_compose_node_config_names_is_mounted_read_only_from_where_keys_init_writes(
    name: str,
) -> None:
    mounts = compose_mounts(compose()["services"][name])
    config = compose_config(name)
    for field, path in config_files(config).items():
        mount = covering(path, mounts)
        assert mount["read_only"] is True, field
        source = (DEPLOY / mount["source"]).resolve()
        assert source.name == path.name, field
        if path.parent == Path("/etc/jointstat/keys"):
            assert source.parent == REPO / "var" / "keys", field  # the layout of `keys init --out var/keys`
        else:
            assert source.is_file(), field  # manifests and inputs come from configs/
    for path in writable_paths(config):
        assert covering(path, mounts).get("read_only") is not True


def test_no_compose_node_is_given_another_nodes_private_keys_or_the_trial_ca_key() -> None:
    for name in NODES:
        given = {
            PurePosixPath(m["source"]).name for m in compose_mounts(compose()["services"][name]).values()
        }
        others = [n for n in NODES if n != name]
        forbidden = {CA_KEY} | {tls_key_file(n) for n in others} | {signing_key_file(n) for n in others}
        assert not given & forbidden
        assert {tls_key_file(name), signing_key_file(name)} <= given


def test_compose_peers_reach_each_other_by_service_name_on_the_listening_port() -> None:
    configs = {name: compose_config(name) for name in NODES}
    for name, config in configs.items():
        (peer,) = config.peers
        assert peer.name in configs and peer.name != name
        assert peer.address.host == peer.name
        assert peer.address.port == configs[peer.name].node.listen.port
        assert peer.certificate == configs[peer.name].tls.certificate
        assert configs[peer.name].peers[0].signing_public_key.name == f"{name}.signing.pub.pem"
    initiators = [name for name, c in configs.items() if c.jobs[0].initiate]
    assert len(initiators) == 1


def test_the_compose_nodes_are_one_of_each_manifest_party_with_the_input_of_that_party() -> None:
    from jointstat.circuit.inputs import read_csv
    from jointstat.circuit.manifest import load_manifest
    from jointstat.circuit.model import Party

    roles = {}
    for name in NODES:
        mounts = compose_mounts(compose()["services"][name])
        (job,) = compose_config(name).jobs
        assert job.input.csv is not None
        manifest = load_manifest(DEPLOY / covering(job.manifest, mounts)["source"])
        table = manifest.table(Party.GARBLER if job.role == "garbler" else Party.EVALUATOR)
        records = read_csv(DEPLOY / covering(job.input.csv.path, mounts)["source"], table)
        assert set(records.columns) == {c.name for c in table.columns} and len(records) > 0, name
        roles[name] = job.role
    assert sorted(roles.values()) == ["evaluator", "garbler"]
    for name, role in roles.items():  # the same organisation is the same party as in configs/nodes/
        (example,) = load_node_config(REPO / "configs" / "nodes" / f"{name}.yaml").jobs
        assert example.role == role, name


def test_the_compose_health_check_and_published_metrics_use_the_configs_ports() -> None:
    services = compose()["services"]
    for name in NODES:
        config = compose_config(name)
        assert config.node.health is not None
        script = services[name]["healthcheck"]["test"][-1]
        assert f'"127.0.0.1:{config.node.health.port}"' in script
        published = [p.split(":") for p in services[name]["ports"]]
        assert all(host == "127.0.0.1" for host, _, _ in published)
        assert [int(inside) for _, _, inside in published] == [config.node.metrics.port]


# -- systemd -------------------------------------------------------------------------------------------------------


def unit() -> dict[str, dict[str, list[str]]]:
    sections: dict[str, dict[str, list[str]]] = {}
    current: dict[str, list[str]] = {}
    for line in (DEPLOY / "jointstat-node.service").read_text(encoding="utf-8").splitlines():
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        if line.startswith("["):
            current = sections.setdefault(line.strip("[]"), {})
            continue
        key, _, value = line.partition("=")
        current.setdefault(key, []).append(value)
    return sections


def test_the_systemd_unit_checks_then_runs_the_node_with_the_images_config_path() -> None:
    service = unit()["Service"]
    (start,) = service["ExecStart"]
    (check,) = service["ExecStartPre"]
    assert shlex.split(start)[1:] == image_command()[1:]
    assert shlex.split(check)[1:] == ["node", "check", "--config", IMAGE_CONFIG]
    assert shlex.split(start)[0] == shlex.split(check)[0] == "/opt/jointstat/bin/jointstat"


def test_the_systemd_unit_runs_as_a_dedicated_user_with_hardening_and_a_graceful_stop() -> None:
    service = unit()["Service"]
    assert service["User"] == ["jointstat"] and service["Group"] == ["jointstat"]
    for key, value in {
        "NoNewPrivileges": "yes",
        "ProtectSystem": "strict",
        "UMask": "0077",
        "Restart": "on-failure",
        "KillSignal": "SIGTERM",
        "StateDirectoryMode": "0700",
        "CapabilityBoundingSet": "",
    }.items():
        assert service[key] == [value], key
    assert re.fullmatch(r"\d+s", service["TimeoutStopSec"][0])
    assert unit()["Install"]["WantedBy"] == ["multi-user.target"]


def test_the_systemd_unit_lets_the_node_write_only_where_its_config_keeps_state() -> None:
    service = unit()["Service"]
    writable = service["ReadWritePaths"][0].split()
    assert service["StateDirectory"] == ["jointstat"] and writable == ["/var/lib/jointstat"]
    for name in NODES:  # the host layout is the container layout
        config = compose_config(name)
        for path in writable_paths(config):
            assert any(under(path, w) for w in writable)
        assert not any(under(p, w) for p in config_files(config).values() for w in writable)


# -- Kubernetes --------------------------------------------------------------------------------------------------


def kube() -> dict[tuple[str, str], dict[str, Any]]:
    docs = {}
    for path in sorted((DEPLOY / "kubernetes").glob("*.yaml")):
        if path.name == "kustomization.yaml":
            continue
        for doc in yaml.safe_load_all(path.read_text(encoding="utf-8")):
            docs[(doc["kind"], doc["metadata"]["name"])] = doc
    return docs


def pod() -> dict[str, Any]:
    return kube()[("StatefulSet", "jointstat")]["spec"]["template"]["spec"]


def node_container() -> dict[str, Any]:
    (container,) = pod()["containers"]
    return container


def kube_config() -> NodeConfig:
    text = kube()[("ConfigMap", "jointstat-node")]["data"]["node.yaml"]
    return parse_node_config(text, "deploy/kubernetes/configmap.yaml: node.yaml")


def kube_mounts(container: dict[str, Any]) -> dict[str, dict[str, Any]]:
    volumes = {v["name"]: v for v in pod()["volumes"]}
    claims = {
        c["metadata"]["name"] for c in kube()[("StatefulSet", "jointstat")]["spec"]["volumeClaimTemplates"]
    }
    mounts = {}
    for mount in container["volumeMounts"]:
        volume = volumes.get(mount["name"], {"claim": True} if mount["name"] in claims else None)
        assert volume is not None, mount["name"]
        mounts[mount["mountPath"]] = {**mount, "volume": volume}
    return mounts


def test_kustomization_lists_every_manifest_file() -> None:
    kustomization = yaml.safe_load((DEPLOY / "kubernetes" / "kustomization.yaml").read_text(encoding="utf-8"))
    present = {p.name for p in (DEPLOY / "kubernetes").glob("*.yaml")} - {"kustomization.yaml"}
    assert set(kustomization["resources"]) == present
    assert kustomization["namespace"] == "jointstat"


def test_the_statefulset_runs_the_image_command_with_the_config_map_at_its_config_path() -> None:
    container = node_container()
    assert image_command()[1:] == container["args"] and "command" not in container
    mount = kube_mounts(container)[config_path_of(container["args"])]
    assert mount["readOnly"] is True and mount["subPath"] == "node.yaml"
    assert mount["volume"]["configMap"]["name"] == "jointstat-node"
    assert kube_config().node.data_dir == Path("/var/lib/jointstat")


def test_the_statefulset_keeps_state_on_a_persistent_volume_claim_at_the_data_directory() -> None:
    statefulset = kube()[("StatefulSet", "jointstat")]
    assert statefulset["spec"]["replicas"] == 1
    (claim,) = statefulset["spec"]["volumeClaimTemplates"]
    assert claim["spec"]["accessModes"] == ["ReadWriteOnce"]
    mounts = kube_mounts(node_container())
    config = kube_config()
    for path in writable_paths(config):
        mount = covering(path, mounts)
        assert mount["volume"] == {"claim": True} and not mount.get("readOnly")
    (job,) = config.jobs
    assert job.input.csv is not None and covering(job.input.csv.path, mounts)["volume"] == {"claim": True}


def test_keys_come_from_the_secret_with_mode_0400_and_reach_the_node_owner_only_and_read_only() -> None:
    volumes = {v["name"]: v for v in pod()["volumes"]}
    assert volumes["keys-secret"]["secret"] == {"secretName": "jointstat-keys", "defaultMode": 0o400}
    assert volumes["keys"]["emptyDir"]["medium"] == "Memory"
    assert "fsGroup" not in pod().get("securityContext", {})  # it would make the secret files group-readable
    (prepare,) = pod()["initContainers"]
    init_mounts = {m["name"]: m["mountPath"] for m in prepare["volumeMounts"]}
    script = prepare["command"][-1]
    uid = node_container()["securityContext"]["runAsUser"]
    assert (
        f"install -o {uid} -g {uid} -m 0400 {init_mounts['keys-secret']}/*.pem {init_mounts['keys']}/"
        in script
    )
    assert prepare["securityContext"]["capabilities"] == {"drop": ["ALL"], "add": ["CHOWN", "FOWNER"]}
    mounts = kube_mounts(node_container())
    assert not any(m["name"] == "keys-secret" for m in mounts.values())  # the node sees only the copy
    config = kube_config()
    for field, path in config_files(config).items():
        mount = covering(path, mounts)
        if path.parent == Path("/etc/jointstat/keys"):
            assert mount["name"] == "keys" and mount["readOnly"] is True, field
            assert mount["mountPath"] == init_mounts["keys"], field
            assert path.name.endswith(".pem"), field  # copied by the init container's *.pem


def test_the_node_container_is_unprivileged() -> None:
    context = node_container()["securityContext"]
    assert context["runAsNonRoot"] is True and context["runAsUser"] != 0
    assert context["readOnlyRootFilesystem"] is True and context["allowPrivilegeEscalation"] is False
    assert context["capabilities"] == {"drop": ["ALL"]}
    assert pod()["automountServiceAccountToken"] is False


def test_the_kubernetes_node_plays_the_same_manifest_party_as_the_same_organisations_compose_node() -> None:
    config = kube_config()
    (job,) = config.jobs
    (compose_job,) = compose_config(config.node.name).jobs
    assert (job.role, job.initiate) == (compose_job.role, compose_job.initiate) == ("garbler", True)


def test_the_job_manifest_is_mounted_where_the_config_expects_and_equals_the_example() -> None:
    config = kube_config()
    (job,) = config.jobs
    mount = covering(job.manifest, kube_mounts(node_container()))
    relative = PurePosixPath(job.manifest).relative_to(mount["mountPath"])
    (item,) = [i for i in mount["volume"]["configMap"]["items"] if i["path"] == str(relative)]
    text = kube()[("ConfigMap", mount["volume"]["configMap"]["name"])]["data"][item["key"]]
    example = (REPO / "configs" / "rainfall-totals" / "manifest.yaml").read_text(encoding="utf-8")
    assert yaml.safe_load(text) == yaml.safe_load(example)


def test_probes_use_the_grpc_health_port_and_the_services_point_at_the_peer_port() -> None:
    config = kube_config()
    container = node_container()
    assert config.node.health is not None
    for probe in ("startupProbe", "readinessProbe", "livenessProbe"):
        assert container[probe]["grpc"] == {"port": config.node.health.port}, probe
    ports = {p["name"]: p["containerPort"] for p in container["ports"]}
    assert ports == {
        "peer": config.node.listen.port,
        "health": config.node.health.port,
        "metrics": config.node.metrics.port,
    }
    peer_service = kube()[("Service", "jointstat-peer")]["spec"]
    assert [(p["port"], p["targetPort"]) for p in peer_service["ports"]] == [
        (config.node.listen.port, "peer")
    ]
    headless = kube()[("Service", kube()[("StatefulSet", "jointstat")]["spec"]["serviceName"])]["spec"]
    assert headless["clusterIP"] == "None"
    labels = kube()[("StatefulSet", "jointstat")]["spec"]["template"]["metadata"]["labels"]
    for service in (peer_service, headless):
        assert service["selector"].items() <= labels.items()


def test_the_network_policy_admits_the_peer_port_and_metrics_only_from_monitoring() -> None:
    config = kube_config()
    policy = kube()[("NetworkPolicy", "jointstat")]["spec"]
    rules = {rule["ports"][0]["port"]: rule.get("from") for rule in policy["ingress"]}
    assert set(rules) == {config.node.listen.port, config.node.metrics.port}
    assert rules[config.node.listen.port] is None
    (source,) = rules[config.node.metrics.port]
    assert source["namespaceSelector"]["matchLabels"] == {"kubernetes.io/metadata.name": "monitoring"}
