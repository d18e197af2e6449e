"""Tamper evidence for a run folder: a SHA-256 manifest, optionally signed with Ed25519.

``manifest.json`` lists every file of the folder (subfolders too) with its size and
SHA-256, and is written last and atomically. ``manifest.sig`` holds an Ed25519 signature
(RFC 8032) of the exact bytes of manifest.json, base64, with the SHA-256 fingerprint of
the public key that checks it. The manifest shows that a file changed after it was
written; only a signature, with its public key kept apart from the folder, shows who
wrote the manifest. ``cryptography`` is optional and imported only for signing.
"""

from __future__ import annotations

import base64
import datetime as _dt
import hashlib
import json
import os
from dataclasses import dataclass, field
from pathlib import Path

MANIFEST = "manifest.json"
SIGNATURE = "manifest.sig"
NOT_LISTED = {MANIFEST, SIGNATURE}
CHUNK = 1 << 20


class ManifestError(ValueError):
    """A manifest or signature that cannot be read, made or trusted."""


@dataclass
class Verification:
    """What ``verify_folder`` found; ``ok`` only when nothing changed, went or came."""

    changed: list[str] = field(default_factory=list)
    missing: list[str] = field(default_factory=list)
    extra: list[str] = field(default_factory=list)
    checked: int = 0
    signature: str = "absent"      # absent, valid, invalid, not checked

    @property
    def ok(self) -> bool:
        return not (self.changed or self.missing or self.extra) and self.signature in (
            "absent", "valid", "not checked")


def sha256_file(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        while chunk := f.read(CHUNK):
            digest.update(chunk)
    return digest.hexdigest()


def folder_files(folder: Path) -> list[str]:
    """Every file under ``folder`` except the manifest and its signature, as POSIX paths."""
    out = []
    for path in sorted(Path(folder).rglob("*")):
        rel = path.relative_to(folder).as_posix()
        if path.is_file() and rel not in NOT_LISTED:
            out.append(rel)
    return out


def write_atomic(path: Path, data: bytes) -> None:
    """Write a temporary file beside ``path``, sync it, then rename it over ``path``."""
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def write_manifest(folder: Path) -> dict[str, object]:
    """Hash every file of ``folder`` into manifest.json (last, atomically).

    An existing signature signed the old manifest, so it is removed: sign again.
    """
    folder = Path(folder)
    files = {rel: {"sha256": sha256_file(folder / rel), "bytes": (folder / rel).stat().st_size}
             for rel in folder_files(folder)}
    manifest: dict[str, object] = {
        "format": "plantrig manifest", "version": 1, "algorithm": "sha256",
        "created_utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        "files": files,
    }
    (folder / SIGNATURE).unlink(missing_ok=True)
    write_atomic(folder / MANIFEST, (json.dumps(manifest, indent=2) + "\n").encode())
    return manifest


def extend_manifest(folder: Path, added: list[str]) -> bool:
    """Add files written into a finished folder (report, exports) to its manifest.

    The folder must still match the old manifest apart from ``added``, so a changed file
    is never laundered into a fresh manifest. Returns True if a signature was removed.
    """
    folder = Path(folder)
    result = verify_folder(folder)
    unexpected = [rel for rel in result.extra + result.changed if rel not in added]
    if result.missing or unexpected:
        raise ManifestError(f"{folder}: does not match its manifest "
                            f"({_problems(result)}); manifest not updated — run "
                            "plantrig verify")
    signed = (folder / SIGNATURE).exists()
    write_manifest(folder)
    return signed


def read_manifest(folder: Path) -> dict[str, dict[str, object]]:
    path = Path(folder) / MANIFEST
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
        files = doc["files"]
        if doc.get("algorithm") != "sha256" or not isinstance(files, dict):
            raise ValueError("unknown algorithm or no file list")
    except FileNotFoundError:
        raise ManifestError(f"{path}: no manifest in this folder") from None
    except (ValueError, KeyError, TypeError) as exc:
        raise ManifestError(f"{path}: not a readable manifest ({exc})") from None
    return files


def verify_folder(folder: Path, public_key: Path | None = None) -> Verification:
    """Compare the folder with its manifest; check the signature when a key is given."""
    folder = Path(folder)
    listed = read_manifest(folder)
    result = Verification()
    present = set(folder_files(folder))
    for rel, entry in sorted(listed.items()):
        if rel not in present:
            result.missing.append(rel)
            continue
        result.checked += 1
        if sha256_file(folder / rel) != entry.get("sha256"):
            result.changed.append(rel)
    result.extra = sorted(present - set(listed))
    if public_key is not None:
        result.signature = "valid" if check_signature(folder, public_key) else "invalid"
    elif (folder / SIGNATURE).exists():
        result.signature = "not checked"
    return result


def generate_keypair(private_path: Path, public_path: Path) -> str:
    """Write a new Ed25519 private key (PKCS#8 PEM, mode 0600) and its public key (PEM).

    Refuses to overwrite either file. Returns the public key's fingerprint.
    """
    from cryptography.hazmat.primitives import serialization
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    for path in (private_path, public_path):
        if Path(path).exists():
            raise ManifestError(f"{path}: exists; not overwritten")
    key = Ed25519PrivateKey.generate()
    private = key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                serialization.NoEncryption())
    fd = os.open(private_path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "wb") as f:
        f.write(private)
    public = key.public_key().public_bytes(serialization.Encoding.PEM,
                                           serialization.PublicFormat.SubjectPublicKeyInfo)
    Path(public_path).write_bytes(public)
    return _fingerprint(key.public_key())


def sign_folder(folder: Path, private_key: Path) -> str:
    """Sign manifest.json with ``private_key``; the folder must verify first."""
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    folder = Path(folder)
    result = verify_folder(folder)
    if result.changed or result.missing or result.extra:
        raise ManifestError(f"{folder}: does not match its manifest; not signed "
                            f"({_problems(result)})")
    key = _load_key(private_key, private=True)
    if not isinstance(key, Ed25519PrivateKey):
        raise ManifestError(f"{private_key}: not an Ed25519 private key")
    signature = key.sign((folder / MANIFEST).read_bytes())
    fingerprint = _fingerprint(key.public_key())
    doc = {"algorithm": "ed25519", "signed": MANIFEST, "public_key_sha256": fingerprint,
           "signature": base64.b64encode(signature).decode("ascii")}
    write_atomic(folder / SIGNATURE, (json.dumps(doc, indent=2) + "\n").encode())
    return fingerprint


def check_signature(folder: Path, public_key: Path) -> bool:
    """True when manifest.sig is a valid signature of manifest.json under ``public_key``."""
    from cryptography.exceptions import InvalidSignature
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

    path = Path(folder) / SIGNATURE
    if not path.exists():
        raise ManifestError(f"{path}: the folder is not signed")
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
        signature = base64.b64decode(doc["signature"], validate=True)
    except (ValueError, KeyError, TypeError) as exc:
        raise ManifestError(f"{path}: not a readable signature ({exc})") from None
    key = _load_key(public_key, private=False)
    if not isinstance(key, Ed25519PublicKey):
        raise ManifestError(f"{public_key}: not an Ed25519 public key")
    try:
        key.verify(signature, (Path(folder) / MANIFEST).read_bytes())
    except InvalidSignature:
        return False
    return True


def _load_key(path: Path, private: bool) -> object:
    from cryptography.hazmat.primitives import serialization

    try:
        data = Path(path).read_bytes()
        if private:
            return serialization.load_pem_private_key(data, password=None)
        return serialization.load_pem_public_key(data)
    except OSError as exc:
        raise ManifestError(f"{path}: cannot read key ({exc.strerror})") from None
    except (ValueError, TypeError) as exc:
        raise ManifestError(f"{path}: not a PEM {'private' if private else 'public'} key "
                            f"({exc})") from None


def _fingerprint(public_key: object) -> str:
    from cryptography.hazmat.primitives import serialization

    raw = public_key.public_bytes(serialization.Encoding.Raw,  # type: ignore[attr-defined]
                                  serialization.PublicFormat.Raw)
    return hashlib.sha256(raw).hexdigest()


def _problems(result: Verification) -> str:
    parts = [f"{len(v)} {k}" for k, v in (("changed", result.changed),
                                          ("missing", result.missing),
                                          ("extra", result.extra)) if v]
    return ", ".join(parts) or "none"
