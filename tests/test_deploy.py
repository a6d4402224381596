"""deploy/: manifests parse and are complete, job scripts carry their settings, the
TLS certificates work with a real scheduler, the local scripts start and stop a cluster."""

from __future__ import annotations

import os
import re
import shutil
import socket
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
import yaml

from forebear.core import spec as spec_mod

ROOT = Path(__file__).resolve().parents[1]
DEPLOY = ROOT / "deploy"
K8S = DEPLOY / "kubernetes"
YAMLS = sorted(p for p in DEPLOY.rglob("*") if p.suffix in (".yaml", ".yml"))
SCRIPTS = sorted(p for p in DEPLOY.rglob("*") if p.suffix in (".sh", ".sbatch", ".pbs"))


def _docs(path: Path) -> list[dict[str, Any]]:
    return [d for d in yaml.safe_load_all(path.read_text()) if d is not None]


def _k8s_objects() -> list[dict[str, Any]]:
    objs = []
    for p in sorted(K8S.glob("*.yaml")):
        objs += [d for d in _docs(p) if "kind" in d and d["kind"] != "Kustomization"]
    return objs


def _by_kind_name(kind: str, name: str) -> dict[str, Any]:
    for o in _k8s_objects():
        if o["kind"] == kind and o["metadata"]["name"] == name:
            return o
    raise AssertionError(f"no {kind} named {name} in deploy/kubernetes")


def test_every_yaml_in_deploy_parses() -> None:
    assert len(YAMLS) >= 10, [str(p) for p in YAMLS]
    for p in YAMLS:
        docs = _docs(p)
        assert docs, f"{p} holds no YAML document"
        assert all(isinstance(d, dict) for d in docs), f"{p}: every document must be a mapping"


def test_every_deploy_script_is_valid_bash() -> None:
    assert {p.name for p in SCRIPTS} >= {"start.sh", "stop.sh", "forebear-controller.sbatch", "forebear-controller.pbs", "make-certs.sh"}
    for p in SCRIPTS:
        res = subprocess.run(["bash", "-n", str(p)], capture_output=True, text=True)
        assert res.returncode == 0, f"{p}: {res.stderr}"
        assert os.access(p, os.X_OK), f"{p} is not executable"


# -- Kubernetes -------------------------------------------------------------

# Fields each kind needs for the API server to accept it (from the Kubernetes API
# reference for apps/v1 Deployment, v1 Service, batch/v1 Job, v1 PersistentVolumeClaim,
# v1 ConfigMap; from memory of https://kubernetes.io/docs/reference/kubernetes-api/).
API_VERSIONS = {"Deployment": "apps/v1", "Service": "v1", "Job": "batch/v1", "PersistentVolumeClaim": "v1", "ConfigMap": "v1"}


def _pod_spec_ok(where: str, pod: dict[str, Any]) -> None:
    containers = pod.get("containers")
    assert isinstance(containers, list) and containers, f"{where}: template.spec.containers is required"
    for c in containers:
        assert c.get("name") and c.get("image"), f"{where}: every container needs name and image"
    names = {v["name"] for v in pod.get("volumes", [])}
    for c in containers:
        for m in c.get("volumeMounts", []):
            assert m["name"] in names, f"{where}: volumeMount {m['name']} has no volume"
            assert m["mountPath"].startswith("/"), f"{where}: mountPath must be absolute"


def test_kubernetes_manifests_have_their_required_fields() -> None:
    objs = _k8s_objects()
    kinds = sorted(o["kind"] for o in objs)
    assert kinds == ["ConfigMap", "Deployment", "Deployment", "Job", "PersistentVolumeClaim", "Service"], kinds
    for o in objs:
        kind, name = o["kind"], o.get("metadata", {}).get("name")
        where = f"{kind} {name}"
        assert o.get("apiVersion") == API_VERSIONS[kind], f"{where}: apiVersion {o.get('apiVersion')}"
        assert name and re.match(r"^[a-z0-9]([-a-z0-9]*[a-z0-9])?$", name), f"{where}: metadata.name must be a DNS label"
        spec = o.get("spec", {})
        if kind == "Deployment":
            selector = spec["selector"]["matchLabels"]
            labels = spec["template"]["metadata"]["labels"]
            assert selector.items() <= labels.items(), f"{where}: selector does not match the pod labels"
            _pod_spec_ok(where, spec["template"]["spec"])
        elif kind == "Job":
            assert spec["template"]["spec"]["restartPolicy"] in ("Never", "OnFailure"), f"{where}: a Job needs restartPolicy Never or OnFailure"
            _pod_spec_ok(where, spec["template"]["spec"])
        elif kind == "Service":
            assert spec["ports"] and all("port" in p for p in spec["ports"]), f"{where}: ports need port"
            assert spec.get("selector"), f"{where}: a Service needs a selector"
        elif kind == "PersistentVolumeClaim":
            assert spec["accessModes"] and spec["resources"]["requests"]["storage"], f"{where}: accessModes and storage request"
        elif kind == "ConfigMap":
            assert o.get("data"), f"{where}: no data"


def test_kubernetes_pieces_fit_together(tmp_path: Path) -> None:
    sched = _by_kind_name("Deployment", "forebear-scheduler")
    svc = _by_kind_name("Service", "forebear-scheduler")
    pod_labels = sched["spec"]["template"]["metadata"]["labels"]
    assert svc["spec"]["selector"].items() <= pod_labels.items(), "the Service does not select the scheduler pods"
    port = svc["spec"]["ports"][0]
    assert port["port"] == 8786
    sched_args = sched["spec"]["template"]["spec"]["containers"][0]["args"]
    assert "--protocol=tls" in sched_args and any(a.startswith("--tls-ca-file=") for a in sched_args)

    worker = _by_kind_name("Deployment", "forebear-worker")
    wc = worker["spec"]["template"]["spec"]["containers"][0]
    assert wc["resources"]["limits"]["nvidia.com/gpu"] == 1
    args = wc["args"]
    assert args[0] == "tls://forebear-scheduler:8786"
    assert args[args.index("--resources") + 1] == "GPU=1"

    pvc = _by_kind_name("PersistentVolumeClaim", "forebear-logbook")
    assert "ReadWriteMany" in pvc["spec"]["accessModes"]
    job = _by_kind_name("Job", "forebear-search")
    for obj in (sched, worker, job):
        for v in obj["spec"]["template"]["spec"]["volumes"]:
            if "secret" in v:
                assert v["secret"]["secretName"] == "forebear-tls"
            if "persistentVolumeClaim" in v:
                assert v["persistentVolumeClaim"]["claimName"] == "forebear-logbook"
            if "configMap" in v:
                assert v["configMap"]["name"] == "forebear-spec"

    # The spec in the ConfigMap is a valid forebear spec that targets the Service over TLS
    # with the Secret's files, and asks for the GPU resource the workers advertise.
    cm = _by_kind_name("ConfigMap", "forebear-spec")
    path = tmp_path / "search.yaml"
    path.write_text(cm["data"]["search.yaml"])
    s = spec_mod.load(path)
    assert s.cluster.kind == "address" and s.cluster.address == "tls://forebear-scheduler:8786"
    assert s.cluster.tls == {"ca": "/certs/ca.pem", "cert": "/certs/tls.crt", "key": "/certs/tls.key"}
    assert dict(s.resources) == {"GPU": 1}
    assert str(s.logbook).startswith("/logbook/")
    assert job["spec"]["template"]["spec"]["containers"][0]["command"][:3] == ["forebear", "run", "/spec/search.yaml"]
    kust = _docs(K8S / "kustomization.yaml")[0]
    assert sorted(kust["resources"]) == sorted(p.name for p in K8S.glob("*.yaml") if p.name != "kustomization.yaml")


@pytest.mark.parametrize("spec_file", ["slurm/search.yaml", "pbs/search.yaml", "docker/search.yaml"])
def test_deploy_specs_are_valid(spec_file: str) -> None:
    s = spec_mod.load(DEPLOY / spec_file)
    assert s.budget.wall_time or s.budget.trials <= 60, "a cluster spec should bound the time it spends"


def test_dockerfile_pins_torch_and_installs_the_package() -> None:
    lines = [ln.strip() for ln in (DEPLOY / "docker" / "Dockerfile").read_text().splitlines() if ln.strip() and not ln.startswith("#")]
    assert lines[0].startswith("FROM ")
    text = "\n".join(lines)
    assert "ARG TORCH_VERSION=2.13.0" in text and '"torch==${TORCH_VERSION}"' in text
    assert "COPY src ./src" in text and "USER forebear" in text
    extras = re.search(r'pip install "\.\[([\w,]+)\]"', text)
    assert extras, "the Dockerfile does not install the package with extras"
    import tomllib

    declared = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["optional-dependencies"]
    assert set(extras.group(1).split(",")) <= set(declared)


# -- job schedulers (dask-jobqueue renders the job script; no SLURM or PBS needed) --


def _with_jobqueue_config(section: str) -> dict[str, Any]:
    cfg = _docs(DEPLOY / section / "jobqueue.yaml")[0]["jobqueue"][section]
    return {f"jobqueue.{section}.{k}": v for k, v in cfg.items()}


def test_slurm_jobqueue_yaml_renders_a_gpu_job_script(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import dask

    monkeypatch.chdir(tmp_path)  # the config's relative log-directory is created in the working folder
    from dask_jobqueue import SLURMCluster

    # interface ib0 exists on the example site's nodes, not here; loopback stands in for it.
    with dask.config.set(_with_jobqueue_config("slurm")), SLURMCluster(interface="lo") as cluster:
        script = cluster.job_script()
    for line in ("#SBATCH -p gpu", "#SBATCH -A ml-team", "#SBATCH --cpus-per-task=4", "#SBATCH -t 02:00:00", "#SBATCH --gres=gpu:1"):
        assert line in script, f"missing {line!r} in\n{script}"
    assert "--resources GPU=1" in script and "--nthreads 4" in script


def test_pbs_jobqueue_yaml_renders_a_gpu_job_script(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import dask

    monkeypatch.chdir(tmp_path)  # the config's relative log-directory is created in the working folder
    from dask_jobqueue import PBSCluster

    with dask.config.set(_with_jobqueue_config("pbs")), PBSCluster(interface="lo") as cluster:
        script = cluster.job_script()
    for line in ("#PBS -q gpu", "#PBS -A ml-team", "#PBS -l select=1:ncpus=8:ngpus=1:mem=32GB", "#PBS -l walltime=04:00:00"):
        assert line in script, f"missing {line!r} in\n{script}"
    assert "--resources GPU=1" in script


@pytest.mark.parametrize("section", ["slurm", "pbs"])
def test_deploy_specs_render_one_gpu_worker_per_job(section: str) -> None:
    """Through forebear's own dispatch: each job has one GPU, so exactly one worker may advertise it."""
    from forebear.cluster.dispatch import jobqueue_cluster

    cluster = jobqueue_cluster(spec_mod.load(DEPLOY / section / "search.yaml"))
    try:
        script = cluster.job_script()
    finally:
        cluster.close()
    assert "--resources GPU=1" in script
    assert "--nworkers" not in script, f"several workers would share one GPU:\n{script}"
    assert ("--gres=gpu:1" in script) if section == "slurm" else ("ngpus=1" in script)


# -- TLS: the Kubernetes scheduler/worker arguments with make-certs.sh's certificates --


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _k8s_args(name: str, certs: Path) -> list[str]:
    c = _by_kind_name("Deployment", name)["spec"]["template"]["spec"]["containers"][0]
    return [a.replace("/certs/", f"{certs}/") for a in c["args"]]


@pytest.mark.skipif(shutil.which("openssl") is None, reason="openssl is not installed")
def test_tls_certificates_admit_only_holders(tmp_path: Path) -> None:
    """A real scheduler and worker started with the manifests' TLS arguments and the certificates
    from make-certs.sh: a client with the certificates runs a GPU-annotated task; one without is refused."""
    from distributed import Client
    from distributed.security import Security

    certs = tmp_path / "certs"
    subprocess.run([str(K8S / "make-certs.sh"), str(certs)], check=True, capture_output=True, timeout=60)
    port = _free_port()
    sched_args = [a for a in _k8s_args("forebear-scheduler", certs) if not a.startswith(("--host=", "--port=", "--dashboard-address="))]
    # The scheduler's HTTP server runs even with --no-dashboard; keep it on loopback too.
    sched_args += ["--host=127.0.0.1", f"--port={port}", "--no-dashboard", "--dashboard-address=127.0.0.1:0"]
    worker_args = _k8s_args("forebear-worker", certs)
    worker_args = [f"tls://127.0.0.1:{port}", "--host=127.0.0.1", *[a for a in worker_args[1:] if not a.startswith(("--name=", "--dashboard-address="))], "--name=tls-worker", "--dashboard-address=127.0.0.1:0"]
    procs = []
    try:
        procs.append(subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_scheduler", *sched_args], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True))
        procs.append(subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_worker", *worker_args], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True))
        sec = Security(tls_ca_file=str(certs / "ca.pem"), tls_client_cert=str(certs / "tls.crt"), tls_client_key=str(certs / "tls.key"), require_encryption=True)
        with Client(f"tls://127.0.0.1:{port}", security=sec, timeout=30) as client:
            client.wait_for_workers(1, timeout=60)
            assert client.submit(sum, [1, 2, 3], resources={"GPU": 1}).result(timeout=30) == 6
        # Without certificates the client cannot even open a TLS connection (distributed raises
        # TypeError for the missing SSL context); with certificates from another CA the handshake fails.
        with pytest.raises((TypeError, OSError)):
            Client(f"tls://127.0.0.1:{port}", timeout=3)
        other = tmp_path / "other-ca"
        subprocess.run([str(K8S / "make-certs.sh"), str(other)], check=True, capture_output=True, timeout=60)
        stranger = Security(tls_ca_file=str(other / "ca.pem"), tls_client_cert=str(other / "tls.crt"), tls_client_key=str(other / "tls.key"), require_encryption=True)
        with pytest.raises(OSError):
            Client(f"tls://127.0.0.1:{port}", security=stranger, timeout=5)
    finally:
        for p in reversed(procs):
            p.terminate()
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait()


# -- deploy/local: a loopback cluster that a search then uses -----------------


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    # A zombie is a finished process its parent has not reaped yet: the third field of
    # /proc/<pid>/stat is the state, "Z" for a zombie (Linux proc(5), from memory).
    try:
        return Path(f"/proc/{pid}/stat").read_text().split()[2] != "Z"
    except OSError:
        return True


def _listeners(group_leaders: list[int]) -> set[tuple[str, int]]:
    """Listening TCP addresses of every process in the given process groups (psutil comes with distributed)."""
    import psutil

    out: set[tuple[str, int]] = set()
    for proc in psutil.process_iter(["pid"]):
        try:
            if os.getpgid(proc.pid) not in group_leaders:
                continue
            for c in proc.net_connections(kind="inet"):
                if c.status == psutil.CONN_LISTEN:
                    out.add((c.laddr.ip, c.laddr.port))
        except (psutil.Error, ProcessLookupError, PermissionError):
            continue
    return out


def test_local_scripts_start_and_stop_a_cluster_a_search_uses(tmp_path: Path) -> None:
    state = tmp_path / "cluster"
    port = _free_port()
    env = {**os.environ, "PYTHON": sys.executable}
    start = subprocess.run([str(DEPLOY / "local" / "start.sh"), "-n", "2", "-p", str(port), "-d", str(state), "-r", "GPU=1"],
                           capture_output=True, text=True, env=env, timeout=120)
    pids = [int(p.read_text()) for p in state.glob("*.pid")]
    try:
        assert start.returncode == 0, start.stderr
        address = start.stdout.strip()
        assert address == f"tcp://127.0.0.1:{port}"
        assert len(pids) == 3 and all(_pid_alive(p) for p in pids)
        listening = _listeners(pids)
        assert listening and all(host in ("127.0.0.1", "::1") for host, _ in listening), f"not loopback only: {listening}"
        again = subprocess.run([str(DEPLOY / "local" / "start.sh"), "-d", str(state)], capture_output=True, text=True, env=env, timeout=30)
        assert again.returncode == 2 and "already holds pid files" in again.stderr

        from distributed import Client

        with Client(address, timeout=30) as client:
            info = client.scheduler_info(n_workers=-1)
            workers = info["workers"].values()
            assert len(workers) == 2
            assert all(w["host"] == "127.0.0.1" and w["resources"] == {"GPU": 1} for w in workers)
        import dataclasses

        import forebear.face.api as controller

        # examples/cluster_gpu's own spec (a torch objective asking for one GPU per trial),
        # pointed at this cluster's port, with a smaller budget and the logbook under tmp_path.
        s = spec_mod.load(ROOT / "examples" / "cluster_gpu" / "search.yaml")
        assert dict(s.resources) == {"GPU": 1}
        s = dataclasses.replace(
            s,
            cluster=dataclasses.replace(s.cluster, address=address),
            budget=dataclasses.replace(s.budget, trials=4),
            logbook=tmp_path / "runs" / "returns.jsonl",
        )
        result = controller.run(s)
        assert result.closed == "budget"
        assert len([t for t in result.trials if t.state == "scored"]) == 4, [t.error for t in result.trials]
        assert all(t.attempts for t in result.trials), "every trial ran on the cluster's workers"
    finally:
        stop = subprocess.run([str(DEPLOY / "local" / "stop.sh"), "-d", str(state)], capture_output=True, text=True, timeout=90)
    assert stop.returncode == 0, stop.stderr
    assert not list(state.glob("*.pid"))
    assert not any(_pid_alive(p) for p in pids), "stop.sh left processes running"
