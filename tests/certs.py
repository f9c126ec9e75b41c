"""Test certificates made with the `cryptography` package: a private CA, a server certificate for
127.0.0.1/localhost and a client certificate, written as PEM files (for MQTT TLS, the metrics listener, OPC UA).

    pki = make_pki(tmp_path)                       # CA, server and client, EC P-256 (fast)
    pki = make_pki(tmp_path, key_type="rsa")       # RSA 2048 (OPC UA Basic256Sha256 needs RSA)
    pki.ca_cert, pki.server_cert, pki.server_key, pki.client_cert, pki.client_key   # paths
    other = make_ca(tmp_path / "other", "Other test CA")   # an unrelated CA, for "wrong CA" tests

Everything is valid from one hour ago for 30 days, so clock skew in a container does not matter.  Nothing here is
fit for production use: the keys are unencrypted unless ``key_password`` is given.

mosquitto started as root drops to its own user *before* it reads certificates and keys, so a PKI for it must lie
in a directory every user can traverse (not under pytest's 0700 ``tmp_path``): use :func:`broker_pki`, which
makes a fresh directory under /tmp with readable files, and :func:`remove_pki` afterwards.
"""

from __future__ import annotations

import datetime as dt
import ipaddress
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec, rsa
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

__all__ = ["CA", "PKI", "Issued", "broker_pki", "issue", "make_ca", "make_pki", "remove_pki"]

KeyType = Literal["ec", "rsa"]
PrivateKey = ec.EllipticCurvePrivateKey | rsa.RSAPrivateKey


def _key(key_type: KeyType) -> PrivateKey:
    if key_type == "rsa":
        return rsa.generate_private_key(public_exponent=65537, key_size=2048)
    return ec.generate_private_key(ec.SECP256R1())


def _name(cn: str) -> x509.Name:
    return x509.Name([
        x509.NameAttribute(NameOID.ORGANIZATION_NAME, "Fennick Water Board (test)"),
        x509.NameAttribute(NameOID.COMMON_NAME, cn),
    ])


def _validity() -> tuple[dt.datetime, dt.datetime]:
    now = dt.datetime.now(dt.UTC)
    return now - dt.timedelta(hours=1), now + dt.timedelta(days=30)


def _write_key(key: PrivateKey, path: Path, password: bytes | None) -> None:
    encryption: serialization.KeySerializationEncryption = (
        serialization.BestAvailableEncryption(password) if password else serialization.NoEncryption())
    path.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, encryption))
    path.chmod(0o600)


@dataclass(frozen=True)
class CA:
    cert: x509.Certificate
    key: PrivateKey
    cert_path: Path
    key_path: Path


@dataclass(frozen=True)
class Issued:
    cert: x509.Certificate
    key: PrivateKey
    cert_path: Path
    key_path: Path
    der_path: Path  # the certificate in DER form (OPC UA stacks like it that way)


def make_ca(directory: Path, cn: str = "edgevib test CA", key_type: KeyType = "ec") -> CA:
    """A self-signed CA in ``directory`` (``ca.crt``, ``ca.key``)."""
    directory.mkdir(parents=True, exist_ok=True)
    key = _key(key_type)
    not_before, not_after = _validity()
    cert = (
        x509.CertificateBuilder()
        .subject_name(_name(cn))
        .issuer_name(_name(cn))
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(not_before)
        .not_valid_after(not_after)
        .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
        .add_extension(x509.KeyUsage(digital_signature=True, content_commitment=False, key_encipherment=False,
                                     data_encipherment=False, key_agreement=False, key_cert_sign=True,
                                     crl_sign=True, encipher_only=False, decipher_only=False), critical=True)
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(key.public_key()), critical=False)
        .sign(key, hashes.SHA256())
    )
    cert_path, key_path = directory / "ca.crt", directory / "ca.key"
    cert_path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    _write_key(key, key_path, None)
    return CA(cert, key, cert_path, key_path)


def issue(ca: CA, directory: Path, stem: str, cn: str, *, server: bool = False, client: bool = False,
          dns: tuple[str, ...] = (), ips: tuple[str, ...] = (), uris: tuple[str, ...] = (),
          key_type: KeyType = "ec", key_password: bytes | None = None) -> Issued:
    """A leaf certificate signed by ``ca``: ``<stem>.crt``, ``<stem>.key`` (PEM) and ``<stem>.der``."""
    directory.mkdir(parents=True, exist_ok=True)
    key = _key(key_type)
    not_before, not_after = _validity()
    usages = ([ExtendedKeyUsageOID.SERVER_AUTH] if server else []) + ([ExtendedKeyUsageOID.CLIENT_AUTH]
                                                                      if client else [])
    sans: list[x509.GeneralName] = [x509.DNSName(d) for d in dns]
    sans += [x509.IPAddress(ipaddress.ip_address(i)) for i in ips]
    sans += [x509.UniformResourceIdentifier(u) for u in uris]
    rsa_key = key_type == "rsa"
    builder = (
        x509.CertificateBuilder()
        .subject_name(_name(cn))
        .issuer_name(ca.cert.subject)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(not_before)
        .not_valid_after(not_after)
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(x509.KeyUsage(digital_signature=True, content_commitment=rsa_key,
                                     key_encipherment=rsa_key, data_encipherment=rsa_key,
                                     key_agreement=not rsa_key, key_cert_sign=False, crl_sign=False,
                                     encipher_only=False, decipher_only=False), critical=True)
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(key.public_key()), critical=False)
        .add_extension(x509.AuthorityKeyIdentifier.from_issuer_public_key(ca.key.public_key()), critical=False)
    )
    if usages:
        builder = builder.add_extension(x509.ExtendedKeyUsage(usages), critical=False)
    if sans:
        builder = builder.add_extension(x509.SubjectAlternativeName(sans), critical=False)
    cert = builder.sign(ca.key, hashes.SHA256())
    cert_path, key_path, der_path = (directory / f"{stem}.{ext}" for ext in ("crt", "key", "der"))
    cert_path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    der_path.write_bytes(cert.public_bytes(serialization.Encoding.DER))
    _write_key(key, key_path, key_password)
    return Issued(cert, key, cert_path, key_path, der_path)


@dataclass(frozen=True)
class PKI:
    dir: Path
    ca: CA
    server: Issued
    client: Issued
    client_cn: str

    @property
    def ca_cert(self) -> Path:
        return self.ca.cert_path

    @property
    def server_cert(self) -> Path:
        return self.server.cert_path

    @property
    def server_key(self) -> Path:
        return self.server.key_path

    @property
    def client_cert(self) -> Path:
        return self.client.cert_path

    @property
    def client_key(self) -> Path:
        return self.client.key_path


def make_pki(directory: Path, *, client_cn: str = "edgevib-quarry-lane", key_type: KeyType = "ec",
             client_key_password: bytes | None = None) -> PKI:
    """A CA, a server certificate for ``localhost`` and ``127.0.0.1`` and a client certificate ``client_cn``."""
    ca = make_ca(directory, key_type=key_type)
    server = issue(ca, directory, "server", "localhost", server=True, dns=("localhost",), ips=("127.0.0.1",),
                   key_type=key_type)
    client = issue(ca, directory, "client", client_cn, client=True, key_type=key_type,
                   key_password=client_key_password)
    return PKI(directory, ca, server, client, client_cn)


def broker_pki(**kw: object) -> PKI:
    """:func:`make_pki` in a new directory under /tmp that a broker running as another user can read
    (directory 0755, files 0644; test keys only)."""
    directory = Path(tempfile.mkdtemp(prefix="edgevib-pki-"))
    directory.chmod(0o755)
    pki = make_pki(directory, **kw)  # type: ignore[arg-type]
    for p in directory.iterdir():
        p.chmod(0o644)
    return pki


def remove_pki(pki: PKI) -> None:
    shutil.rmtree(pki.dir, ignore_errors=True)
