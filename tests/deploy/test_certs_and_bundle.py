"""TLS material and the app bundle, without running Flower's servers.

External references: the certificate chain is checked with the ``cryptography`` package's own issuer
verification and Python's ``ssl`` module; the bundle is read with ``zipfile`` and ``tomllib``.
"""

from __future__ import annotations

import hashlib
import io
import json
import ssl
import stat
import subprocess
import tomllib
import zipfile
from pathlib import Path

import pytest
from cryptography import x509

from federation.deploy.certs import certificate_names, new_certificates
from federation.deploy.fab import build_app_bundle as coordinator_bundle
from federation.protocol import ValidationToolError
from federation.protocol.app_bundle import build_app_bundle as site_bundle

from .harness import BIN


def test_certificates_chain_names_and_key_modes(tmp_path: Path) -> None:
    paths = new_certificates(tmp_path / "certs", ("coordinator.example.org", "10.0.0.5"))
    ca = x509.load_pem_x509_certificate(paths.ca_certificate.read_bytes())
    server = x509.load_pem_x509_certificate(paths.server_certificate.read_bytes())
    server.verify_directly_issued_by(ca)  # raises if the CA did not sign it
    assert ca.extensions.get_extension_for_class(x509.BasicConstraints).value.ca is True
    assert server.extensions.get_extension_for_class(x509.BasicConstraints).value.ca is False
    names = certificate_names(paths.server_certificate)
    assert names == ["127.0.0.1", "localhost", "coordinator.example.org", "10.0.0.5"]
    for key in (paths.ca_key, paths.server_key):
        assert stat.S_IMODE(key.stat().st_mode) == 0o600
    # Python's TLS stack accepts the pair as a server identity and the CA as a trust anchor.
    context = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    context.load_cert_chain(paths.server_certificate, paths.server_key)
    ssl.create_default_context(cafile=str(paths.ca_certificate))


def test_certificates_refuse_overwrite_and_bad_names(tmp_path: Path) -> None:
    new_certificates(tmp_path / "certs")
    with pytest.raises(ValidationToolError, match="refusing to overwrite"):
        new_certificates(tmp_path / "certs")
    with pytest.raises(ValidationToolError, match="host name or an IP address"):
        new_certificates(tmp_path / "other", ("bad name",))


def test_coordinator_and_site_build_the_same_bundle_with_no_code() -> None:
    coordinator = coordinator_bundle()
    built = site_bundle()
    content, digest = built.content, built.sha256
    assert content == coordinator.content and digest == coordinator.sha256
    assert digest == hashlib.sha256(content).hexdigest()
    assert coordinator_bundle().content == content  # deterministic
    with zipfile.ZipFile(io.BytesIO(content)) as archive:
        assert archive.namelist() == ["pyproject.toml", ".info/CONTENT"]
        config = tomllib.loads(archive.read("pyproject.toml").decode())
    assert config["tool"]["flwr"]["app"]["components"] == {
        "serverapp": "federation.flower_server:app",
        "clientapp": "site_agent.flower_client:app",
    }
    assert config["project"]["version"] == coordinator.package_version


def test_site_agent_app_hash_command_prints_the_hash(tmp_path: Path) -> None:
    digest = site_bundle().sha256
    result = subprocess.run(
        [str(BIN / "site-agent"), "app", "hash", "--json", "--out", str(tmp_path / "app.fab")],
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert result.returncode == 0, result.stderr
    assert json.loads(result.stdout)["sha256"] == digest
    assert hashlib.sha256((tmp_path / "app.fab").read_bytes()).hexdigest() == digest
