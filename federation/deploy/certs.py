"""TLS material for the coordinator's SuperLink: a private certificate authority and a server certificate.

Sites verify the SuperLink with ``ca.crt`` (pass it to ``site-agent join --root-certificates``); the
SuperLink serves ``server.pem``/``server.key``. Keys are ECDSA P-384 (NIST curve, accepted by Python's
``ssl`` and by every TLS stack a site is likely to run); the private keys are written mode 0600.

The certificate profile follows RFC 5280: the CA is ``cA=TRUE, pathLen=0`` with keyCertSign/cRLSign;
the server certificate names every host a site may dial in subjectAltName (TLS clients ignore the
common name, RFC 6125 §6.4.4) and is limited to serverAuth.
"""

from __future__ import annotations

import datetime as dt
import ipaddress
import os
from dataclasses import dataclass
from pathlib import Path

from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

from federation.protocol import ValidationToolError

DEFAULT_NAMES = ("127.0.0.1", "localhost")
CA_DAYS = 3650
SERVER_DAYS = 825  # the longest server-certificate lifetime browsers accepted (common practice)


@dataclass(frozen=True)
class CertificatePaths:
    """Where ``federation certs new`` wrote the TLS files."""

    ca_certificate: Path
    ca_key: Path
    server_certificate: Path
    server_key: Path

    @classmethod
    def in_folder(cls, folder: Path) -> CertificatePaths:
        folder = Path(folder)
        return cls(folder / "ca.crt", folder / "ca.key", folder / "server.pem", folder / "server.key")

    def check(self) -> None:
        """Fail with one line naming the first missing file the SuperLink needs."""
        for path in (self.ca_certificate, self.server_certificate, self.server_key):
            if not path.is_file():
                raise ValidationToolError(f"{path}: not found (make the files with `federation certs new --out DIR`)")


def _name(common_name: str) -> x509.Name:
    return x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, common_name)])


def _subject_alt_names(names: tuple[str, ...]) -> list[x509.GeneralName]:
    entries: list[x509.GeneralName] = []
    for name in names:
        try:
            entries.append(x509.IPAddress(ipaddress.ip_address(name)))
        except ValueError:
            entries.append(x509.DNSName(name))
    return entries


def _write_private(path: Path, key: ec.EllipticCurvePrivateKey) -> None:
    data = key.private_bytes(
        serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
    )
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "wb") as handle:
        handle.write(data)


def new_certificates(out: Path, names: tuple[str, ...] = (), days: int = SERVER_DAYS) -> CertificatePaths:
    """Write ``ca.crt``, ``ca.key``, ``server.pem`` and ``server.key`` into ``out``; refuse to overwrite.

    ``names`` are host names or IP addresses sites will dial, in addition to 127.0.0.1 and localhost.
    """
    paths = CertificatePaths.in_folder(out)
    for path in (paths.ca_certificate, paths.ca_key, paths.server_certificate, paths.server_key):
        if path.exists():
            raise ValidationToolError(f"{path}: already exists; refusing to overwrite TLS material")
    all_names = tuple(dict.fromkeys((*DEFAULT_NAMES, *(n.strip() for n in names if n.strip()))))
    for name in all_names:
        if any(ch.isspace() for ch in name) or "/" in name:
            raise ValidationToolError(f"--name {name!r}: must be a host name or an IP address")
    if not 1 <= days <= CA_DAYS:
        raise ValidationToolError(f"--days: must be from 1 to {CA_DAYS}")
    Path(out).mkdir(parents=True, exist_ok=True)
    now = dt.datetime.now(dt.UTC) - dt.timedelta(minutes=5)  # tolerate small clock differences at sites

    ca_key = ec.generate_private_key(ec.SECP384R1())
    ca_name = _name("multisite-validation coordinator CA")
    ca_cert = (
        x509.CertificateBuilder()
        .subject_name(ca_name)
        .issuer_name(ca_name)
        .public_key(ca_key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now)
        .not_valid_after(now + dt.timedelta(days=CA_DAYS))
        .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
        .add_extension(
            x509.KeyUsage(
                digital_signature=True,
                content_commitment=False,
                key_encipherment=False,
                data_encipherment=False,
                key_agreement=False,
                key_cert_sign=True,
                crl_sign=True,
                encipher_only=False,
                decipher_only=False,
            ),
            critical=True,
        )
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(ca_key.public_key()), critical=False)
        .sign(ca_key, hashes.SHA384())
    )

    server_key = ec.generate_private_key(ec.SECP384R1())
    server_cert = (
        x509.CertificateBuilder()
        .subject_name(_name(all_names[-1]))
        .issuer_name(ca_name)
        .public_key(server_key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now)
        .not_valid_after(now + dt.timedelta(days=days))
        .add_extension(x509.SubjectAlternativeName(_subject_alt_names(all_names)), critical=False)
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(
            x509.KeyUsage(
                digital_signature=True,
                content_commitment=False,
                key_encipherment=False,
                data_encipherment=False,
                key_agreement=True,
                key_cert_sign=False,
                crl_sign=False,
                encipher_only=False,
                decipher_only=False,
            ),
            critical=True,
        )
        .add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.SERVER_AUTH]), critical=False)
        .add_extension(x509.AuthorityKeyIdentifier.from_issuer_public_key(ca_key.public_key()), critical=False)
        .sign(ca_key, hashes.SHA384())
    )

    _write_private(paths.ca_key, ca_key)
    _write_private(paths.server_key, server_key)
    paths.ca_certificate.write_bytes(ca_cert.public_bytes(serialization.Encoding.PEM))
    paths.server_certificate.write_bytes(server_cert.public_bytes(serialization.Encoding.PEM))
    return paths


def certificate_names(path: Path) -> list[str]:
    """The subjectAltName entries of a certificate, as text (for `federation certs show` and tests)."""
    cert = x509.load_pem_x509_certificate(Path(path).read_bytes())
    san = cert.extensions.get_extension_for_class(x509.SubjectAlternativeName).value
    return [str(entry.value) for entry in san]
