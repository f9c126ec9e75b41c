"""Self-signed OPC UA application instance certificates for tests, made with the `cryptography` package.

OPC UA (Part 6 §6.2.2, Part 4 §6.1) wants the application URI in the certificate's subjectAltName as a URI,
the host name as a DNS name, and key usages for signing and key encipherment; asyncua checks the URI against
the application's ``application_uri``.
"""

from __future__ import annotations

import datetime
import socket
from dataclasses import dataclass
from pathlib import Path

from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import rsa
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID


@dataclass(frozen=True)
class CertPair:
    cert_der: Path
    key_pem: Path
    application_uri: str


def make_cert(directory: Path, name: str, application_uri: str, *, server: bool) -> CertPair:
    """Write ``<name>.der`` (certificate) and ``<name>.pem`` (unencrypted PKCS#8 key) into ``directory``."""
    key = rsa.generate_private_key(public_exponent=65537, key_size=2048)
    subject = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, f"edgevib test {name}"),
                         x509.NameAttribute(NameOID.ORGANIZATION_NAME, "Fennick Water Board (test)")])
    now = datetime.datetime.now(datetime.UTC)
    usage = ExtendedKeyUsageOID.SERVER_AUTH if server else ExtendedKeyUsageOID.CLIENT_AUTH
    cert = (
        x509.CertificateBuilder()
        .subject_name(subject)
        .issuer_name(subject)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - datetime.timedelta(minutes=5))
        .not_valid_after(now + datetime.timedelta(days=2))
        .add_extension(x509.SubjectAlternativeName([
            x509.UniformResourceIdentifier(application_uri),
            x509.DNSName(socket.gethostname()),
            x509.DNSName("localhost"),
        ]), critical=False)
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(x509.KeyUsage(digital_signature=True, content_commitment=True, key_encipherment=True,
                                     data_encipherment=True, key_agreement=False, key_cert_sign=False,
                                     crl_sign=False, encipher_only=False, decipher_only=False), critical=True)
        .add_extension(x509.ExtendedKeyUsage([usage]), critical=False)
        .sign(key, hashes.SHA256())
    )
    directory.mkdir(parents=True, exist_ok=True)
    pair = CertPair(directory / f"{name}.der", directory / f"{name}.pem", application_uri)
    pair.cert_der.write_bytes(cert.public_bytes(serialization.Encoding.DER))
    pair.key_pem.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                               serialization.NoEncryption()))
    return pair
