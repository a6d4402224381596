"""Security: loopback-only listeners, mutual TLS across authorities, no shell, private files, no unpickling."""

from __future__ import annotations

import ast
import csv
import datetime
import ipaddress
import json
import os
import pickle
import stat
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import psutil
import pytest
import yaml
from click.testing import CliRunner

import forebear
from forebear.cluster.dispatch import insecure_warning
from forebear.core.spec import load
from forebear.face.cli import main as cli_main
from forebear.loop.controller import Controller
from forebear.records.logbook import Logbook, record

from .conftest import LoopbackCluster

SRC = Path(__file__).resolve().parents[1] / "src" / "forebear"
DEADLINE = 120.0


# --------------------------------------------------------------------------
# listening sockets of the embedded cluster


def _listeners(pids: set[int]) -> list[tuple[str, int]]:
    """(address, port) of every listening TCP socket the processes hold, read from /proc.

    /proc/net/tcp{,6} list sockets by inode; /proc/<pid>/fd links name the
    inodes a process holds. Independent of psutil, which the check below
    compares against.
    """
    inodes: set[str] = set()
    for pid in pids:
        try:
            for fd in os.listdir(f"/proc/{pid}/fd"):
                try:
                    target = os.readlink(f"/proc/{pid}/fd/{fd}")
                except OSError:
                    continue
                if target.startswith("socket:["):
                    inodes.add(target[8:-1])
        except OSError:
            continue
    out = []
    for table, width in (("/proc/net/tcp", 4), ("/proc/net/tcp6", 16)):
        try:
            lines = Path(table).read_text().splitlines()[1:]
        except OSError:
            continue
        for line in lines:
            cols = line.split()
            local, state, inode = cols[1], cols[3], cols[9]
            if state != "0A" or inode not in inodes:  # 0A: TCP_LISTEN
                continue
            hex_ip, hex_port = local.split(":")
            raw = bytes.fromhex(hex_ip)
            # The kernel prints each 32-bit word in host (little-endian) order.
            raw = b"".join(raw[i : i + 4][::-1] for i in range(0, len(raw), 4))
            ip = ipaddress.ip_address(raw if width == 16 else raw[:4])
            if isinstance(ip, ipaddress.IPv6Address) and ip.ipv4_mapped:
                ip = ip.ipv4_mapped
            out.append((str(ip), int(hex_port, 16)))
    return out


def test_proc_listener_parser_sees_a_known_socket() -> None:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen()
        port = s.getsockname()[1]
        assert ("127.0.0.1", port) in _listeners({os.getpid()})
    with socket.socket() as s:
        s.bind(("0.0.0.0", 0))
        s.listen()
        assert ("0.0.0.0", s.getsockname()[1]) in _listeners({os.getpid()})


def _spec(tmp: Path, cluster: dict[str, Any], **extra: Any) -> dict[str, Any]:
    spec: dict[str, Any] = {
        "name": "sec",
        "objective": {"call": "forebear.bench.faults:sleeper", "minimize": "loss"},
        "space": {"x": {"float": [0.2, 0.6]}, "y": {"float": [-1.0, 1.0]}},
        "budget": {"trials": 4, "batch": 2, "concurrency": 2},
        "cluster": cluster,
        "logbook": str(tmp / "runs" / "sec.jsonl"),
    }
    spec.update(extra)
    return spec


@pytest.mark.timeout(300)
def test_embedded_cluster_listens_on_loopback_only_while_a_search_runs(tmp_path: Path) -> None:
    spec = load(_spec(tmp_path, {"local": {"workers": 2}}))
    errors: list[BaseException] = []

    def drive() -> None:
        try:
            Controller(spec).run()
        except BaseException as exc:  # noqa: BLE001 - surfaced below
            errors.append(exc)

    thread = threading.Thread(target=drive, daemon=True)
    thread.start()
    deadline = time.monotonic() + DEADLINE
    while not (spec.logbook.exists() and any(r["kind"] == "started" for r in Logbook(spec.logbook).records())):
        assert time.monotonic() < deadline and not errors, errors or "no attempt started"
        time.sleep(0.1)
    me = psutil.Process()
    tree = {me.pid, *(p.pid for p in me.children(recursive=True))}  # scheduler here; nannies, workers, fork servers below
    found = _listeners(tree)
    by_psutil = set()
    for pid in tree:
        try:
            by_psutil |= {(c.laddr.ip, c.laddr.port) for c in psutil.Process(pid).net_connections(kind="inet") if c.status == psutil.CONN_LISTEN}
        except psutil.Error:
            continue
    thread.join(DEADLINE)
    assert not thread.is_alive() and not errors, errors
    # Scheduler, its dashboard, two workers and two nannies at least.
    assert len(found) >= 6, found
    assert {ip for ip, _ in found} == {"127.0.0.1"}, found
    assert set(found) == by_psutil


# --------------------------------------------------------------------------
# mutual TLS with two authorities


def _authority(folder: Path, name: str) -> dict[str, str]:
    """A CA and a certificate it signs for 127.0.0.1 (server and client use), as 0600 PEM files."""
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

    folder.mkdir(parents=True, exist_ok=True, mode=0o700)
    now = datetime.datetime.now(datetime.timezone.utc)
    ca_key = ec.generate_private_key(ec.SECP256R1())
    ca_name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, f"{name} test authority")])
    ca = (
        x509.CertificateBuilder().subject_name(ca_name).issuer_name(ca_name).public_key(ca_key.public_key())
        .serial_number(x509.random_serial_number()).not_valid_before(now - datetime.timedelta(minutes=5))
        .not_valid_after(now + datetime.timedelta(days=1))
        .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
        .add_extension(x509.KeyUsage(digital_signature=True, key_cert_sign=True, crl_sign=True, content_commitment=False,
                                     key_encipherment=False, data_encipherment=False, key_agreement=False,
                                     encipher_only=False, decipher_only=False), critical=True)
        .sign(ca_key, hashes.SHA256())
    )
    key = ec.generate_private_key(ec.SECP256R1())
    cert = (
        x509.CertificateBuilder().subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, f"{name} node")]))
        .issuer_name(ca_name).public_key(key.public_key()).serial_number(x509.random_serial_number())
        .not_valid_before(now - datetime.timedelta(minutes=5)).not_valid_after(now + datetime.timedelta(days=1))
        .add_extension(x509.SubjectAlternativeName([x509.DNSName("localhost"), x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]), critical=False)
        .add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.SERVER_AUTH, ExtendedKeyUsageOID.CLIENT_AUTH]), critical=False)
        .sign(ca_key, hashes.SHA256())
    )
    files = {
        "ca": ca.public_bytes(serialization.Encoding.PEM),
        "cert": cert.public_bytes(serialization.Encoding.PEM),
        "key": key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()),
    }
    out = {}
    for what, data in files.items():
        path = folder / f"{name}-{what}.pem"
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        out[what] = str(path)
    return out


def _client(address: str, ca: str, cert: str | None, key: str | None) -> Any:
    from distributed import Client
    from distributed.security import Security

    return Client(address, security=Security(tls_ca_file=ca, tls_client_cert=cert, tls_client_key=key, require_encryption=True), timeout="4s")


@pytest.mark.timeout(300)
def test_mutual_tls_refuses_another_authority(tmp_path: Path, loopback_factory: Callable[..., LoopbackCluster]) -> None:
    ours = _authority(tmp_path / "certs", "ours")
    theirs = _authority(tmp_path / "certs", "theirs")
    cluster = loopback_factory(tls=ours, workers=1)
    assert cluster.address.startswith("tls://127.0.0.1:")
    # The authority's own certificate gets in (so the refusals below are about the certificates).
    with _client(cluster.address, ours["ca"], ours["cert"], ours["key"]) as c:
        assert len(c.scheduler_info(n_workers=-1)["workers"]) == 1
    # A client certificate signed by another authority, even one that trusts ours: refused by the scheduler.
    with pytest.raises(OSError):
        _client(cluster.address, ours["ca"], theirs["cert"], theirs["key"])
    # A client of the other authority does not accept our scheduler either.
    with pytest.raises(OSError):
        _client(cluster.address, theirs["ca"], theirs["cert"], theirs["key"])
    # And forebear run with the other authority's files stops with one line, exit 2.
    spec = tmp_path / "other.yaml"
    spec.write_text(yaml.safe_dump(_spec(tmp_path / "other", {"address": cluster.address, "tls": theirs})))
    res = CliRunner().invoke(cli_main, ["run", str(spec), "--quiet"])
    assert res.exit_code == 2, res.stderr
    assert "cannot connect to the scheduler" in res.stderr and "Traceback" not in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1


@pytest.mark.parametrize(
    ("address", "warns"),
    [
        ("tcp://10.1.2.3:8786", True),
        ("10.1.2.3:8786", True),
        ("tcp://0.0.0.0:8786", True),
        ("tcp://[2001:db8::7]:8786", True),
        ("tcp://localhost.example.org:8786", True),
        ("TCP://192.168.1.9:8786", True),
        ("ws://10.1.2.3:8786", True),
        ("tcp://127.0.0.2:8786", False),
        ("tcp://[::1]:8786", False),
        ("tls://10.1.2.3:8786", False),
        ("wss://10.1.2.3:8786", False),
    ],
)
def test_plain_address_beyond_loopback_warns(address: str, warns: bool) -> None:
    # Only the check: no traffic is ever sent to these addresses.
    text = insecure_warning(address, allow_insecure=False)
    assert (text is not None) == warns, text
    if warns:
        assert address in text and "cluster.tls" in text
    assert insecure_warning(address, allow_insecure=True) is None


# --------------------------------------------------------------------------
# command objectives: argv, never a shell; files private


HOSTILE = ["; rm -rf victim", "$(touch pwned)", "`touch pwned`", "a b | tee pwned", "x' && touch 'pwned"]
ARGV_SCRIPT = "import json, sys; print(json.dumps({'loss': float(len(sys.argv)), 'argv': json.dumps(sys.argv[1:])}))"


@pytest.mark.timeout(300)
def test_command_values_arrive_as_one_argv_item_and_files_are_private(tmp_path: Path, shared_loopback: LoopbackCluster) -> None:
    victim = tmp_path / "victim"
    victim.mkdir()
    (victim / "keep.txt").write_text("still here")
    spec_path = tmp_path / "argv.yaml"
    spec_path.write_text(yaml.safe_dump({
        "name": "argv",
        "objective": {"command": ["python", "-c", ARGV_SCRIPT, "{arg}", "--flag={arg}"], "minimize": "loss"},
        "space": {"arg": {"categories": HOSTILE}},
        "budget": {"trials": len(HOSTILE), "batch": len(HOSTILE), "concurrency": 2},
        "cluster": {"address": shared_loopback.address},
        "logbook": "runs/argv.jsonl",
    }))
    result = forebear.run(spec_path)
    assert result.counts["scored"] == len(HOSTILE), [t.error for t in result.trials]
    seen = {t.config["arg"]: json.loads(t.metrics["argv"]) for t in result.trials}
    assert set(seen) == set(HOSTILE)
    for value, argv in seen.items():
        assert argv == [value, f"--flag={value}"]
    assert (victim / "keep.txt").read_text() == "still here"
    assert not list(tmp_path.rglob("pwned"))
    # Everything forebear created for the search: files 0600, folders 0700.
    runs = tmp_path / "runs"
    made = [runs, *runs.rglob("*")]
    assert any(p.suffix == ".log" for p in made) and any(p.suffix == ".jsonl" for p in made)
    for p in made:
        mode = stat.S_IMODE(p.stat().st_mode)
        assert mode == (0o700 if p.is_dir() else 0o600), f"{p}: {oct(mode)}"


# --------------------------------------------------------------------------
# nothing is unpickled


class _Bomb:
    """Unpickling this makes a folder: proof, if it ever appears, that something unpickled."""

    def __init__(self, marker: Path) -> None:
        self.marker = marker

    def __reduce__(self) -> tuple[Any, ...]:
        return (os.mkdir, (str(self.marker),))


def test_pickle_payloads_in_logbook_and_history_are_data(tmp_path: Path) -> None:
    marker = tmp_path / "UNPICKLED"
    raw = pickle.dumps(_Bomb(marker), protocol=0)
    text = raw.decode("latin-1")
    logbook = tmp_path / "runs" / "p.jsonl"
    j = Logbook(logbook)
    j.append(record("search", name="p", spec_hash="h", space={"x": {"float": [0, 1]}, "tag": {"categories": [text, "plain"]}},
                    objective={"minimize": "loss"}, seed=0))
    j.append(record("proposed", trial=0, round=0, config={"x": 0.5, "tag": text}, source="initial", model=None, acquisition=None))
    j.append(record("scored", trial=0, attempt=1, score=0.25, metrics={"blob": text}, seconds=1.0))
    with open(logbook, "ab") as fh:
        fh.write(pickle.dumps(_Bomb(marker)) + b"\n")  # a raw binary pickle as a line of its own
    j.append(record("proposed", trial=1, round=0, config={"x": 0.1, "tag": "plain"}, source="initial", model=None, acquisition=None))
    past = tmp_path / "past.csv"
    with open(past, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["task", "x", "tag", "loss"])
        w.writerows([["t1", i / 10, text, i / 10] for i in range(3)])
    earlier = Logbook(tmp_path / "earlier" / "e.jsonl")  # the same payload in a clean logbook used as history
    earlier.append_many([r for r in j.records() if r["kind"] != "proposed" or r["trial"] == 0])

    table = forebear.load(logbook)
    assert table.skipped == 1 and table.trials[0].config["tag"] == text and table.trials[0].metrics["blob"] == text
    runner = CliRunner()
    for args in (["status", str(logbook)], ["best", str(logbook), "--json"], ["export", str(logbook), "--csv", str(tmp_path / "o.csv")]):
        res = runner.invoke(cli_main, args)
        assert res.exit_code == 0, res.stderr
    assert json.loads(runner.invoke(cli_main, ["best", str(logbook), "--json"]).stdout)["config"]["tag"] == text

    from forebear.core.spec import HistorySource
    from forebear.records.history import load as load_history

    space = load({"objective": {"call": "m:f", "minimize": "loss"}, "logbook": str(tmp_path / "new.jsonl"),
                  "space": {"x": {"float": [0.0, 1.0]}, "tag": {"categories": [text, "plain"]}}}).space
    sources = [HistorySource(logbook=str(tmp_path / "earlier" / "*.jsonl")), HistorySource(csv=str(past), task="task", score="loss")]
    hist = load_history(sources, space, "minimize")
    assert len(hist) == 2 and hist.n_points == 4, hist.warnings
    assert all(c["tag"] == text for t in hist.tasks for c in t.configs)
    assert not marker.exists()


_FORBIDDEN_MODULES = {"pickle", "cPickle", "_pickle", "dill", "cloudpickle", "shelve", "marshal", "jsonpickle"}
_LOADERS = {"load", "loads", "Unpickler", "open", "decode"}


def unsafe_loads(source: str) -> list[str]:
    """Places in ``source`` that could turn bytes into objects or run a shell (line: what)."""
    found = []
    for node in ast.walk(ast.parse(source)):
        # Importing pickle to test whether something pickles (pickle.dumps) is harmless; loading is not.
        if isinstance(node, ast.ImportFrom) and (node.module or "").split(".")[0] in _FORBIDDEN_MODULES:
            for alias in node.names:
                if alias.name in _LOADERS:
                    found.append(f"{node.lineno}: from {node.module} import {alias.name}")
        if not isinstance(node, ast.Call):
            continue
        fn = node.func
        dotted = ast.unparse(fn)
        kw = {k.arg: k.value for k in node.keywords if k.arg}
        if isinstance(fn, ast.Name) and fn.id in ("eval", "exec"):
            found.append(f"{node.lineno}: {fn.id}()")
        elif dotted.split(".")[0] in _FORBIDDEN_MODULES and dotted.rsplit(".", 1)[-1] in _LOADERS:
            found.append(f"{node.lineno}: {dotted}()")
        elif dotted in ("yaml.load", "yaml.unsafe_load", "yaml.full_load", "yaml.load_all", "yaml.unsafe_load_all"):
            found.append(f"{node.lineno}: {dotted}()")
        elif dotted == "torch.load" and not (isinstance(kw.get("weights_only"), ast.Constant) and kw["weights_only"].value is True):
            found.append(f"{node.lineno}: torch.load() without weights_only=True")
        elif dotted in ("np.load", "numpy.load") and isinstance(kw.get("allow_pickle"), ast.Constant) and kw["allow_pickle"].value:
            found.append(f"{node.lineno}: {dotted}(allow_pickle=True)")
        elif dotted in ("os.system", "os.popen") or (isinstance(kw.get("shell"), ast.Constant) and kw["shell"].value):
            found.append(f"{node.lineno}: {dotted}() through a shell")
    return found


def test_the_scanner_finds_unsafe_loads() -> None:
    bad = (
        "import pickle\nimport yaml, torch, os, subprocess\nimport numpy as np\nfrom dill import loads\n"
        "pickle.loads(b'')\nyaml.load(s)\ntorch.load(p)\ntorch.load(p, weights_only=False)\nnp.load(p, allow_pickle=True)\n"
        "eval('1')\nos.system('ls')\nsubprocess.run('ls', shell=True)\n"
    )
    assert len(unsafe_loads(bad)) == 9, unsafe_loads(bad)
    good = "import pickle, yaml, torch\npickle.dumps(x)\nyaml.safe_load(s)\ntorch.load(p, weights_only=True)\nmodel.eval()\nsubprocess.run(['ls'])\n"
    assert unsafe_loads(good) == []


def test_no_unpickling_or_shell_in_the_package() -> None:
    files = sorted(SRC.rglob("*.py"))
    assert len(files) > 10
    problems = {str(p.relative_to(SRC)): unsafe_loads(p.read_text()) for p in files}
    # The one sanctioned load: a function objective (forebear.run(objective=fn)) is the user's own
    # code, pickled by the user's process and loaded in the attempt's child, as Dask ships functions.
    sanctioned = {"cluster/child.py": ["pickle.loads()"]}
    found = {k: [x.split(": ", 1)[1] for x in v] for k, v in problems.items() if v}
    assert found == sanctioned
