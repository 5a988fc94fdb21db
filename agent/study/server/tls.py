"""The server's TLS certificate and the pin agents check.

The pin is the SHA-256 of the certificate in DER form (hex).  It goes on the
study card; the agent trusts exactly that certificate and nothing else (see
:func:`agent.uploader.pinned_context`), so a self-signed certificate is as
good as a CA-issued one and a stolen CA certificate is no better than none.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import ipaddress
from pathlib import Path

from ...errors import DataError
from ...fsutil import write_private


def tls_dir(study_dir) -> Path:
    return Path(study_dir) / "server" / "tls"


def cert_pin(cert_pem_or_der: bytes) -> str:
    """SHA-256 of the certificate's DER bytes, hex (what the card's ``server.certificate_sha256`` holds)."""
    from cryptography import x509
    from cryptography.hazmat.primitives.serialization import Encoding

    data = cert_pem_or_der
    if data.lstrip().startswith(b"-----BEGIN"):
        try:
            data = x509.load_pem_x509_certificate(data).public_bytes(Encoding.DER)
        except ValueError as e:
            raise DataError(f"not a PEM certificate ({e})") from None
    return hashlib.sha256(data).hexdigest()


def self_signed(study_dir, hosts=("localhost", "127.0.0.1"), *, days: int = 397) -> tuple[Path, Path]:
    """Create (or reuse) ``STUDYDIR/server/tls/{cert,key}.pem``: an ECDSA P-256 self-signed certificate.

    The certificate names every host in ``hosts`` (DNS names and IP addresses)
    as a subject alternative name.  An existing pair is kept, so the pin on
    cards already handed out stays valid.
    """
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    d = tls_dir(study_dir)
    cert_path, key_path = d / "cert.pem", d / "key.pem"
    if cert_path.exists() and key_path.exists():
        return cert_path, key_path
    key = ec.generate_private_key(ec.SECP256R1())
    names: list[x509.GeneralName] = []
    for h in dict.fromkeys(hosts):
        try:
            names.append(x509.IPAddress(ipaddress.ip_address(h)))
        except ValueError:
            names.append(x509.DNSName(h))
    subject = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "lethe study server")])
    now = _dt.datetime.now(_dt.UTC)
    cert = (x509.CertificateBuilder().subject_name(subject).issuer_name(subject).public_key(key.public_key())
            .serial_number(x509.random_serial_number()).not_valid_before(now - _dt.timedelta(minutes=5))
            .not_valid_after(now + _dt.timedelta(days=days))
            .add_extension(x509.SubjectAlternativeName(names), critical=False)
            .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
            .sign(key, hashes.SHA256()))
    write_private(key_path, key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                              serialization.NoEncryption()))
    write_private(cert_path, cert.public_bytes(serialization.Encoding.PEM))
    cert_path.chmod(0o644)
    return cert_path, key_path
