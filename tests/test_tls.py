"""Mutual TLS with certificates from Security.temporary(): searches run, strangers are refused."""

from __future__ import annotations

import os
import socket
import ssl
from pathlib import Path
from typing import Any

import pytest
from distributed import Client
from distributed.security import Security

import forebear
from forebear.cluster.dispatch import ClusterError, connect


def write_certs(sec: Security, folder: Path) -> dict[str, str]:
    """Write the PEM texts Security.temporary() holds in memory to 0600 files."""
    folder.mkdir(parents=True, exist_ok=True, mode=0o700)
    out = {}
    for name, text in (("ca", sec.tls_ca_file), ("cert", sec.tls_client_cert), ("key", sec.tls_client_key)):
        path = folder / f"{name}.pem"
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(fd, "w") as fh:
            fh.write(str(text))
        out[name] = str(path)
    return out


@pytest.fixture(scope="module")
def certs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, str]:
    return write_certs(Security.temporary(), tmp_path_factory.mktemp("certs"))


def handshake(address: str, ca: str, cert: tuple[str, str] | None) -> str:
    """'accepted' when the scheduler keeps a TLS connection open, 'refused' when it drops it."""
    host, port = address.removeprefix("tls://").rsplit(":", 1)
    ctx = ssl.create_default_context(cafile=ca)
    ctx.check_hostname = False
    if cert:
        ctx.load_cert_chain(*cert)
    with socket.create_connection((host, int(port)), timeout=3) as raw:
        try:
            with ctx.wrap_socket(raw) as tls:
                # TLS 1.3 reports a missing client certificate after the handshake, on the first read.
                tls.settimeout(2)
                data = tls.recv(1)
                return "refused" if data == b"" else "accepted"
        except (ssl.SSLError, ConnectionResetError, BrokenPipeError):
            return "refused"
        except TimeoutError:
            return "accepted"  # the scheduler waits for a Dask message: the connection is up


def spec_for(tmp: Path, address: str, tls: dict[str, str] | None) -> dict[str, Any]:
    spec: dict[str, Any] = {
        "name": "tls",
        "objective": {"call": "objectives:quadratic", "minimize": "loss"},
        "space": {"x": {"float": [0.0, 1.0]}},
        "budget": {"trials": 3, "batch": 2, "concurrency": 2},
        "cluster": {"address": address},
        "logbook": str(tmp / "runs" / "tls.jsonl"),
    }
    if tls:
        spec["cluster"]["tls"] = tls
    return spec


def test_tls_search_and_refusals(tmp_path: Path, loopback_factory: Any, certs: dict[str, str]) -> None:
    cluster = loopback_factory(tls=certs)
    assert cluster.address.startswith("tls://127.0.0.1:")
    result = forebear.run(spec_for(tmp_path, cluster.address, certs))
    assert result.counts["scored"] == 3

    # A client that trusts the authority but has no certificate of its own: the scheduler refuses it
    # (checked at the socket level; the same handshake with the certificate is accepted).
    assert handshake(cluster.address, certs["ca"], None) == "refused"
    assert handshake(cluster.address, certs["ca"], (certs["cert"], certs["key"])) == "accepted"
    # distributed's own client will not even try a tls:// address without a TLS context.
    with pytest.raises((OSError, TypeError)):
        Client(cluster.address, timeout="3s")
    # Plain TCP to the TLS port: refused as well.
    with pytest.raises(OSError):
        Client(cluster.address.replace("tls://", "tcp://"), timeout="3s")
    # Certificates from another authority: refused.
    stranger = write_certs(Security.temporary(), tmp_path / "stranger")
    with pytest.raises(ClusterError, match="cannot connect to the scheduler"):
        forebear.run(spec_for(tmp_path / "other", cluster.address, stranger))


def test_tls_paths_relative_to_the_spec_and_under_home(tmp_path: Path, loopback_factory: Any, certs: dict[str, str],
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    """``cluster.tls`` paths relative to the spec file's folder, and ``~/...`` under $HOME, reach a
    real TLS scheduler; the working folder plays no part."""
    import shutil

    import yaml

    from forebear.core import spec as spec_mod

    cluster = loopback_factory(tls=certs)
    project, home, elsewhere = tmp_path / "project", tmp_path / "home", tmp_path / "elsewhere"
    for folder in (project / "certs", home / ".forebear-tls", elsewhere):
        folder.mkdir(parents=True)
    for name, path in certs.items():
        shutil.copy(path, project / "certs" / f"{name}.pem")
        shutil.copy(path, home / ".forebear-tls" / f"{name}.pem")
    monkeypatch.setenv("HOME", str(home))
    monkeypatch.chdir(elsewhere)
    for tag, tls, where in (("relative", "certs", project / "certs"), ("home", "~/.forebear-tls", home / ".forebear-tls")):
        spec = spec_for(project, cluster.address, {k: f"{tls}/{k}.pem" for k in ("ca", "cert", "key")})
        spec["logbook"] = f"runs/{tag}.jsonl"
        path = project / f"{tag}.yaml"
        path.write_text(yaml.safe_dump(spec))
        loaded = spec_mod.load(path)
        assert loaded.cluster.tls == {k: str((where / f"{k}.pem").resolve()) for k in ("ca", "cert", "key")}
        if tag == "relative":
            result = forebear.run(path)
            assert result.counts["scored"] == 3
            assert (project / "runs" / "relative.jsonl").exists() and not list(elsewhere.iterdir())
        else:
            # The same connection without a second search: the client reaches the TLS scheduler.
            with connect(loaded, lambda _: None) as d:
                assert len(d.client.scheduler_info(n_workers=-1)["workers"]) == 2
