"""Electronic signatures: who signed which file, when, and with what meaning; and whom to trust.

A signature is a small JSON document (`format: planrunner.signature/1`) kept beside what it signs:
the signer's printed name, the fingerprint and public half of the Ed25519 key, the UTC time, the
meaning (authored, reviewed, approved, executed) and the *subject*: the kind of document, its file
name, the SHA-256 of what was signed and the document's own id (a run id, the time a lock or a
qualification pack was made, a history sequence number). The Ed25519 signature covers the
canonical JSON of all of those, so none of them can be changed, and a signature copied beside
another record names a subject that is not that record.

A signature proves only that the holder of a key signed. Whom a key belongs to, and what that person
may sign, comes from the signers file kept with the plan (`signers.yaml`): each signer's name,
public key, roles (author, reviewer, approver, executor) and optional validity dates, and which
meanings are required on records, history entries and locks.

This module is pure (no files, no clock, no printing): `planrunner.trail.signfiles` reads and
writes the keys, signatures and signers files.
"""

from __future__ import annotations

import base64
import binascii
import datetime as dt
import hashlib
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from planrunner.record.canonical import canonical_json, content_sha256
from planrunner.trail.meanings import MEANINGS

if TYPE_CHECKING:
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

# `cryptography` is imported where a key is used, so that a run that neither signs nor checks a
# signature does not load it (it adds to every command's start-up)

SIGNATURE_FORMAT = "planrunner.signature/1"
SIGNATURE_FIELD = "signature"
SIGNERS_FORMAT = "planrunner.signers/1"
ROLE_OF_MEANING = {"authored": "author", "reviewed": "reviewer", "approved": "approver", "executed": "executor"}
ROLES = tuple(ROLE_OF_MEANING.values())
SUBJECT_KINDS = ("record", "lock", "history-entry", "qualification")
# the qualification pack (planrunner.audit.qualify) is signed like a record; its format is named here
QUALIFICATION_FORMAT = "planrunner.qualification/1"
QUALIFICATION_HASH_FIELD = "qualification_sha256"
# what a signers file requires when it does not say: every run signed by whoever executed it
DEFAULT_REQUIRE = {"record": ("executed",), "history-entry": ("executed",), "lock": (), "qualification": ()}
REQUIRE_KEYS = {"record": "record", "history": "history-entry", "lock": "lock", "qualification": "qualification"}


@dataclass(frozen=True)
class Subject:
    """What a signature is about. ``sha256``: of the file's bytes, or of a history entry's content."""
    kind: str
    name: str
    sha256: str
    id: str

    def as_dict(self) -> dict[str, str]:
        return {"kind": self.kind, "name": self.name, "sha256": self.sha256, "id": self.id}

    def describe(self) -> str:
        label = {"record": "run", "lock": "lock", "history-entry": "entry", "qualification": "pack"}[self.kind]
        return f"{self.kind} {self.name} ({label} {self.id})"


@dataclass(frozen=True)
class SigningKey:
    """A private key unlocked for signing, and the printed name it signs under."""
    key: Ed25519PrivateKey
    signer: str

    def public_raw(self) -> bytes:
        return public_bytes(self.key.public_key())


def public_bytes(public: Ed25519PublicKey) -> bytes:
    from cryptography.hazmat.primitives import serialization
    return public.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)


def fingerprint(public_raw: bytes) -> str:
    """The key's fingerprint: SHA-256 of its 32 raw bytes, in hex."""
    return hashlib.sha256(public_raw).hexdigest()


def short(fp: str) -> str:
    return fp[:16]


def b64(data: bytes) -> str:
    return base64.b64encode(data).decode("ascii")


def unb64(text: Any, length: int | None = None) -> bytes | None:
    """Bytes from base64 text, or None when the text is not base64 (of the given length)."""
    if not isinstance(text, str):
        return None
    try:
        data = base64.b64decode(text.encode("ascii"), validate=True)
    except (binascii.Error, UnicodeEncodeError):
        return None
    return data if length is None or len(data) == length else None


def signed_bytes(document: dict[str, Any]) -> bytes:
    """What the Ed25519 signature covers: the canonical JSON of every field but the signature."""
    return canonical_json({k: v for k, v in document.items() if k != SIGNATURE_FIELD}).encode("utf-8")


def make_signature(signing: SigningKey, *, meaning: str, signed_utc: str, subject: Subject) -> dict[str, Any]:
    if meaning not in MEANINGS:
        raise ValueError(f"meaning {meaning!r} is not one of {MEANINGS}")
    raw = signing.public_raw()
    document: dict[str, Any] = {
        "format": SIGNATURE_FORMAT,
        "signer": signing.signer,
        "fingerprint": fingerprint(raw),
        "public_key": b64(raw),
        "signed_utc": signed_utc,
        "meaning": meaning,
        "subject": subject.as_dict(),
    }
    document[SIGNATURE_FIELD] = b64(signing.key.sign(signed_bytes(document)))
    return document


def history_entry_subject(entry: dict[str, Any], log_name: str) -> Subject:
    """A history entry's subject: its content without its own hash and without the signature it carries."""
    body = {k: v for k, v in entry.items() if k not in ("entry_sha256", SIGNATURE_FIELD, "_line")}
    return Subject("history-entry", log_name, content_sha256(body), str(entry.get("seq")))


# --- trusted signers -------------------------------------------------------------------------------

@dataclass(frozen=True)
class Signer:
    name: str
    public_raw: bytes
    fingerprint: str
    roles: tuple[str, ...]
    valid_from: dt.date | None = None
    valid_until: dt.date | None = None  # inclusive: the whole day counts


@dataclass(frozen=True)
class Signers:
    file: str
    sha256: str  # of the signers file's bytes, printed so it can be compared with a copy kept apart
    signers: tuple[Signer, ...]
    require: dict[str, tuple[str, ...]] = field(default_factory=lambda: dict(DEFAULT_REQUIRE))

    def by_fingerprint(self, fp: str) -> Signer | None:
        return next((s for s in self.signers if s.fingerprint == fp), None)


def _date(value: Any) -> dt.date | None | str:
    """A date from YAML (already a date, or YYYY-MM-DD text); an error message otherwise."""
    if value is None or isinstance(value, dt.date) and not isinstance(value, dt.datetime):
        return value
    if isinstance(value, str):
        try:
            return dt.date.fromisoformat(value)
        except ValueError:
            pass
    return f"{value!r} is not a date (YYYY-MM-DD)"


def _meanings(value: Any) -> tuple[str, ...] | str:
    if not isinstance(value, list) or not all(isinstance(m, str) for m in value):
        return "must be a list of meanings"
    wrong = [m for m in value if m not in MEANINGS]
    return f"{', '.join(map(repr, wrong))} not among {', '.join(MEANINGS)}" if wrong else tuple(value)


def _parse_signer(i: int, item: Any, problems: list[tuple[tuple, str]]) -> Signer | None:
    path: tuple = ("signers", i)
    if not isinstance(item, dict):
        problems.append((path, "each signer is a mapping with name, public_key and roles"))
        return None
    for key in item:
        if key not in ("name", "public_key", "roles", "valid_from", "valid_until"):
            problems.append((path + (key,), f"unknown key {key!r} (name, public_key, roles, valid_from, valid_until)"))
    name, raw, roles = item.get("name"), unb64(item.get("public_key"), 32), item.get("roles")
    if not isinstance(name, str) or not name.strip():
        problems.append((path + ("name",), "a signer needs a printed name"))
    if raw is None:
        problems.append((path + ("public_key",), "not an Ed25519 public key (32 bytes in base64, as printed by "
                                                  "'planrunner keygen')"))
    if not isinstance(roles, list) or not roles or not all(r in ROLES for r in roles):
        problems.append((path + ("roles",), f"roles must be a non-empty list of {', '.join(ROLES)}"))
    dates = {key: _date(item.get(key)) for key in ("valid_from", "valid_until")}
    for key, value in dates.items():
        if isinstance(value, str):
            problems.append((path + (key,), value))
    if any(p[0][:2] == path for p in problems):
        return None
    assert isinstance(name, str) and raw is not None and isinstance(roles, list)
    valid_from, valid_until = dates["valid_from"], dates["valid_until"]
    assert not isinstance(valid_from, str) and not isinstance(valid_until, str)
    return Signer(name.strip(), raw, fingerprint(raw), tuple(roles), valid_from, valid_until)


def parse_signers(data: Any, *, file: str, sha256: str) -> tuple[Signers | None, list[tuple[tuple, str]]]:
    """The signers file's content, or every problem in it as (path, message)."""
    problems: list[tuple[tuple, str]] = []
    if not isinstance(data, dict) or data.get("format") != SIGNERS_FORMAT:
        return None, [((), f"not a signers file (it starts with 'format: {SIGNERS_FORMAT}')")]
    for key in data:
        if key not in ("format", "signers", "require"):
            problems.append(((key,), f"unknown key {key!r} (format, signers, require)"))
    items = data.get("signers")
    if not isinstance(items, list) or not items:
        problems.append((("signers",), "a non-empty list of signers is needed"))
        items = []
    signers = [s for i, item in enumerate(items) if (s := _parse_signer(i, item, problems)) is not None]
    seen: dict[str, int] = {}
    for i, s in enumerate(signers):
        if s.fingerprint in seen:
            problems.append((("signers", i, "public_key"), f"the same key as signer {seen[s.fingerprint] + 1}: "
                                                          "one key belongs to one person"))
        seen.setdefault(s.fingerprint, i)
    require = dict(DEFAULT_REQUIRE)
    given = data.get("require", {})
    if not isinstance(given, dict):
        problems.append((("require",), f"a mapping of {', '.join(REQUIRE_KEYS)} to lists of meanings"))
        given = {}
    for key, value in given.items():
        if key not in REQUIRE_KEYS:
            problems.append((("require", key), f"unknown key {key!r} ({', '.join(REQUIRE_KEYS)})"))
            continue
        meanings = _meanings(value)
        if isinstance(meanings, str):
            problems.append((("require", key), meanings))
        else:
            require[REQUIRE_KEYS[key]] = meanings
    if problems:
        return None, problems
    return Signers(file, sha256, tuple(signers), require), []


# --- checking a signature --------------------------------------------------------------------------

@dataclass(frozen=True)
class Finding:
    """One signature as checked: who signed what, when, with what meaning, and whether it holds."""
    where: str  # the signature file (or the history line carrying it)
    subject: str  # what it should sign
    signer: str | None
    meaning: str | None
    signed_utc: str | None
    fingerprint: str | None
    verdict: str  # "valid"; "unchecked" (intact, but no signers file to trust); "invalid"
    message: str  # "valid", or what is wrong

    @property
    def valid(self) -> bool:
        return self.verdict == "valid"


def _utc(text: Any) -> dt.datetime | None:
    if not isinstance(text, str) or not text.endswith("Z"):
        return None
    try:
        return dt.datetime.fromisoformat(text[:-1]).replace(tzinfo=dt.UTC)
    except ValueError:
        return None


def _within(signer: Signer, moment: dt.datetime) -> str | None:
    day = moment.date()
    if signer.valid_from is not None and day < signer.valid_from:
        return f"signed before {signer.name}'s key became valid ({signer.valid_from.isoformat()})"
    if signer.valid_until is not None and day > signer.valid_until:
        return f"signed after {signer.name}'s key expired (valid until {signer.valid_until.isoformat()})"
    return None


def _shape_problem(doc: Any) -> str | None:
    if not isinstance(doc, dict) or doc.get("format") != SIGNATURE_FORMAT:
        return f"not a planrunner signature (format {SIGNATURE_FORMAT} expected)"
    for key in ("signer", "fingerprint", "public_key", "signed_utc", "meaning", SIGNATURE_FIELD):
        if not isinstance(doc.get(key), str):
            return f"the signature has no {key}"
    if not isinstance(doc.get("subject"), dict):
        return "the signature names no subject"
    if doc["meaning"] not in MEANINGS:
        return f"unknown meaning {doc['meaning']!r}"
    if _utc(doc["signed_utc"]) is None:
        return f"the time {doc['signed_utc']!r} is not a UTC time"
    return None


def _authentic(public_raw: bytes, doc: dict[str, Any]) -> bool:
    signature = unb64(doc.get(SIGNATURE_FIELD), 64)
    if signature is None:
        return False
    from cryptography.exceptions import InvalidSignature
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
    try:
        Ed25519PublicKey.from_public_bytes(public_raw).verify(signature, signed_bytes(doc))
    except (InvalidSignature, ValueError):
        return False
    return True


def _subject_problem(doc: dict[str, Any], subject: Subject) -> str | None:
    claimed = doc["subject"]
    if claimed.get("kind") != subject.kind:
        return f"it signs a {claimed.get('kind')}, not this {subject.kind}"
    if claimed.get("id") != subject.id or claimed.get("name") != subject.name:
        return (f"it belongs to another {subject.kind} ({claimed.get('name')}, {claimed.get('id')}), "
                f"not to this one ({subject.name}, {subject.id}): a signature cannot be moved")
    if claimed.get("sha256") != subject.sha256:
        return (f"the {subject.kind} was changed after it was signed (signed SHA-256 {claimed.get('sha256')}, "
                f"now {subject.sha256})")
    return None


def check_signature(doc: Any, subject: Subject, signers: Signers | None, where: str) -> Finding:
    """Check one signature against what it should sign and, when given, against the trusted signers."""
    shape = _shape_problem(doc)
    if shape is not None:
        return Finding(where, subject.describe(), None, None, None, None, "invalid", shape)
    found = (doc["signer"], doc["meaning"], doc["signed_utc"], doc["fingerprint"])

    def verdict(valid: bool, message: str) -> Finding:
        return Finding(where, subject.describe(), *found, "valid" if valid else "invalid", message)

    problem = _subject_problem(doc, subject)
    if problem is not None:
        return verdict(False, problem)
    if signers is None:
        # no one to trust: only whether the document is intact under the key it names
        raw = unb64(doc["public_key"], 32)
        intact = raw is not None and fingerprint(raw) == doc["fingerprint"] and _authentic(raw, doc)
        if intact:
            return Finding(where, subject.describe(), *found, "unchecked",
                           "intact under the key it names, but no signers file says whom to trust")
        return verdict(False, "FORGED: the signature does not match its content")
    signer = signers.by_fingerprint(doc["fingerprint"])
    if signer is None:
        return verdict(False, f"signed by a key that is not in the signers file {signers.file} "
                              f"(fingerprint {short(doc['fingerprint'])}): an untrusted or removed signer")
    if not _authentic(signer.public_raw, doc):
        return verdict(False, f"FORGED: the signature does not match its content under {signer.name}'s key")
    if doc["signer"] != signer.name:
        return verdict(False, f"signed under the name {doc['signer']!r}, but the key is {signer.name!r}'s")
    role = ROLE_OF_MEANING[doc["meaning"]]
    if role not in signer.roles:
        return verdict(False, f"{signer.name} may not sign as {doc['meaning']} (roles: {', '.join(signer.roles)}; "
                              f"'{role}' is needed)")
    outside = _within(signer, _utc(doc["signed_utc"]))  # type: ignore[arg-type]
    if outside is not None:
        return verdict(False, outside)
    return verdict(True, "valid")


def signing_problem(signers: Signers, signing: SigningKey, meaning: str, today: dt.date) -> str | None:
    """Why this key may not sign with this meaning today (checked before a run computes), or None."""
    signer = signers.by_fingerprint(fingerprint(signing.public_raw()))
    if signer is None:
        return (f"the key {short(fingerprint(signing.public_raw()))} is not in the signers file {signers.file}")
    if signer.name != signing.signer:
        return f"the key belongs to {signer.name!r} in the signers file, not to {signing.signer!r}"
    if ROLE_OF_MEANING[meaning] not in signer.roles:
        return f"{signer.name} may not sign as {meaning} (roles: {', '.join(signer.roles)})"
    return _within(signer, dt.datetime.combine(today, dt.time(), dt.UTC))


def missing_meanings(findings: list[Finding], required: tuple[str, ...]) -> list[str]:
    """The required meanings that no valid signature carries."""
    have = {f.meaning for f in findings if f.valid}
    return [m for m in required if m not in have]


def private_key_text(key: Ed25519PrivateKey, passphrase: bytes | None) -> bytes:
    """The private key as PEM (PKCS #8), encrypted with the passphrase when one is given."""
    from cryptography.hazmat.primitives import serialization
    protection: serialization.KeySerializationEncryption = (
        serialization.BestAvailableEncryption(passphrase) if passphrase else serialization.NoEncryption())
    return key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, protection)
