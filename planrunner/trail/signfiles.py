"""The files of signing: key pairs, detached signature files, and the signers file.

The logic is pure and lives in `planrunner.trail.signatures`; this module reads and writes. Like the
rest of the audit trail, nothing is ever replaced: a key, a public key and a signature file are each
created exclusively, and the private key is created readable by its owner only.

Signature files sit beside what they sign, one per signature:
`record.json.executed.3f2a9c1b7d4e5f60.sig.json`, `plan.lock.json.approved.<fingerprint>.sig.json`,
`history.jsonl.entry-4.reviewed.<fingerprint>.sig.json`, `qualification.json.approved.<...>.sig.json`.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import stat
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from planrunner.errors import PlanrunnerError, SigningError
from planrunner.plan.yamlsafe import dotted, load_yaml
from planrunner.record.build import FORMAT as RECORD_FORMAT
from planrunner.record.rehearsal import STAMP as REHEARSAL_STAMP
from planrunner.record.rehearsal import is_rehearsal
from planrunner.trail.history import HISTORY_FILE, parse_lines
from planrunner.trail.lock import LOCK_FORMAT, LOCK_HASH_FIELD
from planrunner.trail.names import require_person_name
from planrunner.trail.signatures import (
    QUALIFICATION_FORMAT,
    QUALIFICATION_HASH_FIELD,
    Finding,
    Signers,
    SigningKey,
    Subject,
    b64,
    check_signature,
    fingerprint,
    history_entry_subject,
    make_signature,
    missing_meanings,
    parse_signers,
    private_key_text,
    public_bytes,
    short,
    signing_problem,
)
from planrunner.trail.store import read_json, write_new_file

SIGNERS_FILE = "signers.yaml"
PUBLIC_KEY_FORMAT = "planrunner.public-key/1"
SIGNATURE_SUFFIX = ".sig.json"


def _create(path: Path, data: bytes, mode: int) -> None:
    """Create a new file with these permissions; an existing file is never replaced. (For the private
    key: `store.write_new_file` stages a copy under the default permissions first.)"""
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
    except FileExistsError:
        raise SigningError("the file exists already; planrunner never replaces a key or a signature",
                           where=str(path), hint="choose another file name") from None
    except OSError as exc:
        raise SigningError(f"cannot create the file: {exc.strerror}", where=str(path)) from None
    try:
        os.fchmod(fd, mode)  # the umask may only narrow the mode; make it exactly this
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
    except BaseException:
        path.unlink(missing_ok=True)
        raise


# --- keys ------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class NewKey:
    private: Path
    public: Path
    fingerprint: str
    public_key: str  # base64 of the 32 raw bytes: what a signers file lists


def public_key_path(private: Path) -> Path:
    return private.with_name(f"{private.name}.public.json")


def generate_key(private: str | Path, *, passphrase: bytes | None, name: str | None) -> NewKey:
    """A new Ed25519 key pair: the private key (owner-only, encrypted under the passphrase when given)
    and beside it the public key with its fingerprint."""
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    private = Path(private)
    public = public_key_path(private)
    if private.exists() or private.is_symlink():
        raise SigningError("the file exists already; planrunner never replaces a key", where=str(private),
                           hint="choose another key file name")
    if public.exists():
        raise SigningError("a public key file of that name exists already", where=str(public),
                           hint="choose another key file name")
    key = Ed25519PrivateKey.generate()
    raw = public_bytes(key.public_key())
    _create(private, private_key_text(key, passphrase), 0o600)
    document = {"format": PUBLIC_KEY_FORMAT, "algorithm": "ed25519", "public_key": b64(raw),
                "fingerprint": fingerprint(raw), "name": name}
    try:
        write_new_file(public, json.dumps(document, indent=2, sort_keys=True) + "\n", what="public key",
                       hint="choose another key file name")
    except BaseException:
        private.unlink(missing_ok=True)
        raise
    return NewKey(private, public, fingerprint(raw), b64(raw))


def load_signing_key(path: str | Path, passphrase: bytes | None, signer: str) -> SigningKey:
    """Unlock a private key for signing; refuse one that others may read, or a wrong passphrase."""
    require_person_name(signer, "the signer's name")
    path = Path(path)
    try:
        mode = path.stat().st_mode
        data = path.read_bytes()
    except FileNotFoundError:
        raise SigningError("key file not found", where=str(path), hint="create one with 'planrunner keygen'") from None
    except OSError as exc:
        raise SigningError(f"cannot read the key: {exc.strerror}", where=str(path)) from None
    if os.name == "posix" and mode & (stat.S_IRWXG | stat.S_IRWXO):
        raise SigningError(f"the private key may be read by others (permissions {stat.filemode(mode)})",
                           where=str(path), hint=f"allow its owner only: chmod 600 {path}")
    if not signer or not signer.strip():
        raise SigningError("a signature needs the signer's printed name", hint="give it with --name")
    from cryptography.exceptions import UnsupportedAlgorithm
    from cryptography.hazmat.primitives import serialization
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    try:
        key = serialization.load_pem_private_key(data, password=passphrase or None)
    except TypeError:
        if passphrase:
            raise SigningError("the key has no passphrase, but one was given", where=str(path),
                               hint="leave out the passphrase option") from None
        raise SigningError("the key is protected by a passphrase", where=str(path),
                           hint="give it with --passphrase-env VAR or --passphrase-file FILE") from None
    except (ValueError, UnsupportedAlgorithm):
        raise SigningError("cannot unlock the key: wrong passphrase, or not a private key file",
                           where=str(path), hint="check the passphrase and the key file") from None
    if not isinstance(key, Ed25519PrivateKey):
        raise SigningError("not an Ed25519 private key", where=str(path), hint="create one with 'planrunner keygen'")
    return SigningKey(key, signer.strip())


def passphrase_from(env: str | None, file: str | Path | None) -> bytes | None:
    """The passphrase named by an environment variable or held on a file's first line; None when
    neither is given. Never taken as text on a command line: a run's command is kept in its record."""
    if env and file:
        raise SigningError("give the passphrase one way only", hint="--passphrase-env or --passphrase-file")
    if env:
        value = os.environ.get(env)
        if value is None:
            raise SigningError(f"the environment variable {env} is not set", hint="set it, or use --passphrase-file")
        return value.encode("utf-8")
    if file:
        try:
            text = Path(file).read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise SigningError(f"cannot read the passphrase file: {exc}", where=str(file)) from None
        return text.splitlines()[0].encode("utf-8") if text else b""
    return None


def unlock_key(key: str | Path, signer: str | None, *, passphrase_env: str | None = None,
               passphrase_file: str | Path | None = None,
               ask: Callable[[str], bytes] | None = None) -> SigningKey:
    """Unlock ``key`` for ``signer``; when it needs a passphrase and none was given, ``ask`` (the
    terminal's prompt, or None where nobody can answer) is asked once."""
    if not signer:
        raise SigningError("a signature needs the signer's printed name", hint="give it with --signer NAME")
    passphrase = passphrase_from(passphrase_env, passphrase_file)
    try:
        return load_signing_key(key, passphrase, signer)
    except SigningError as exc:
        if passphrase is None and ask is not None and "protected by a passphrase" in exc.message:
            return load_signing_key(key, ask(f"passphrase for {key}: "), signer)
        raise


def run_signing_key(sign_key: str | Path | None, signer: str | None, *, passphrase_env: str | None = None,
                    passphrase_file: str | Path | None = None,
                    ask: Callable[[str], bytes] | None = None) -> SigningKey | None:
    """The key a run signs its record and history entry with, or None when the run is not signed
    (`run --sign-key KEY --signer NAME`, `api.run(sign_key=..., signer=...)`)."""
    if sign_key is None:
        if signer:
            raise SigningError("--signer needs --sign-key KEY", hint="give both, or neither")
        return None
    return unlock_key(sign_key, signer, passphrase_env=passphrase_env, passphrase_file=passphrase_file, ask=ask)


# --- what is signed --------------------------------------------------------------------------------

def file_subject(path: str | Path) -> tuple[Path, Subject]:
    """The record (or run folder), lock or qualification pack at ``path`` as a subject to sign."""
    file = Path(path)
    if file.is_dir():
        file = file / "record.json"
    hint = "name a record.json (or its run folder), a lock, a history.jsonl with --entry N, or a qualification.json"
    document = read_json(file, "file to sign", hint=hint, error=SigningError)
    digest = hashlib.sha256(file.read_bytes()).hexdigest()
    kind = document.get("format") if isinstance(document, dict) else None
    if kind == RECORD_FORMAT and isinstance(document.get("run_id"), str):
        return file, Subject("record", file.name, digest, document["run_id"])
    # the id names the document (its time of creation), the sha256 its content: an edit changes the
    # one, a signature taken from another document the other
    if kind == LOCK_FORMAT and isinstance(document.get(LOCK_HASH_FIELD), str):
        return file, Subject("lock", file.name, digest, str(document.get("locked_utc")))
    if kind == QUALIFICATION_FORMAT and isinstance(document.get(QUALIFICATION_HASH_FIELD), str):
        return file, Subject("qualification", file.name, digest, str(document.get("created_utc")))
    raise SigningError("not a record, a lock, a history or a qualification pack", where=str(file), hint=hint)


# the meanings a rehearsal's record may be signed with: reviewing a rehearsal is sound; authoring,
# approving or executing it would present dummy data as a result
REHEARSAL_MEANINGS = ("reviewed",)


def refuse_rehearsal_signature(target: Path, subject: Subject, meaning: str) -> None:
    """A rehearsal's record (planrunner rehearse) is signed as reviewed only, never as executed or
    approved: nothing may present its numbers as a result."""
    if subject.kind != "record" or meaning in REHEARSAL_MEANINGS:
        return
    if is_rehearsal(read_json(target, "file to sign", error=SigningError)):
        raise SigningError(f"this record is a rehearsal ({REHEARSAL_STAMP}); it cannot be signed as {meaning}",
                           where=str(target),
                           hint="a rehearsal may be signed as reviewed; sign the record of a real run as "
                                f"{meaning}")


def history_entries(log: Path) -> list[dict]:
    try:
        text = log.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SigningError("no run history here", where=str(log)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SigningError(f"cannot read the history: {exc}", where=str(log)) from None
    return parse_lines(text)[0]


def entry_subject(log: Path, seq: int) -> Subject:
    for entry in history_entries(log):
        if entry.get("seq") == seq:
            return history_entry_subject(entry, log.name)
    raise SigningError(f"the history has no entry {seq}", where=str(log), hint="'planrunner history' lists them")


def is_history(path: str | Path) -> bool:
    return Path(path).name == HISTORY_FILE


# --- signature files -------------------------------------------------------------------------------

def _prefix(target: Path, subject: Subject) -> str:
    return f"{target.name}.entry-{subject.id}" if subject.kind == "history-entry" else target.name


def write_signature(target: Path, subject: Subject, document: dict[str, Any]) -> Path:
    """Write a signature beside what it signs, under a new name (never replacing one)."""
    path = target.with_name(signature_name(target.name, subject, document))
    return write_new_file(path, signature_text(document), what="signature",
                          taken=f"{document['signer']} has signed this {subject.kind} as {document['meaning']} already",
                          hint="a signature is given once; it is never replaced")


def signature_text(document: dict[str, Any]) -> str:
    return json.dumps(document, indent=2, sort_keys=True, ensure_ascii=False) + "\n"


def signature_files(target: Path, subject: Subject) -> list[Path]:
    return sorted(target.parent.glob(f"{_prefix(target, subject)}.*{SIGNATURE_SUFFIX}"))


def check_files(target: Path, subject: Subject, signers: Signers | None) -> list[Finding]:
    """Every signature file beside ``target`` that is meant for it, checked."""
    findings = []
    for path in signature_files(target, subject):
        try:
            document: Any = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError):
            document = None
        findings.append(check_signature(document, subject, signers, str(path)))
    return findings


# --- the signers file ------------------------------------------------------------------------------

def read_signers(path: str | Path) -> Signers:
    """The trusted signers; every problem in the file at once, each with its line."""
    path = Path(path)
    shown = str(path)
    try:
        data = path.read_bytes()
        text = data.decode("utf-8")
    except FileNotFoundError:
        raise SigningError("signers file not found", where=shown,
                           hint=f"write {SIGNERS_FILE} beside the plan (see the README, 'Signatures')") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SigningError(f"cannot read the signers file: {exc}", where=shown) from None
    try:
        loaded = load_yaml(text, shown)
    except PlanrunnerError as exc:
        raise SigningError(exc.message, where=exc.where, hint=exc.hint) from None
    signers, problems = parse_signers(loaded.data, file=shown, sha256=hashlib.sha256(data).hexdigest())
    if signers is None:
        lines = []
        for where, message in problems:
            p = loaded.position(where)
            lines.append(f"{shown}:{p.line}:{p.column}: {dotted(where) if where else '(file)'}: {message}")
        raise SigningError("\n".join(lines))
    return signers


def find_signers(folder: Path, given: str | Path | None) -> Signers | None:
    """The signers file named on the command line, or signers.yaml in ``folder``; None if neither."""
    if given is not None:
        return read_signers(given)
    beside = folder / SIGNERS_FILE
    return read_signers(beside) if beside.is_file() else None


# --- signing a run ---------------------------------------------------------------------------------

def check_run_signing(signers: Signers | None, signing: SigningKey | None, *, lock_file: Path,
                      refuse_deviations: bool, today: dt.date) -> None:
    """Before a run computes: refuse a signing key the signers file does not trust for 'executed', a
    missing key where the signers file requires signed runs, and (with --refuse-deviations) a lock
    without the signatures the signers file requires."""
    if signers is None:
        return
    required = set(signers.require["record"]) | set(signers.require["history-entry"])
    if signing is None and "executed" in required:
        raise SigningError("the signers file requires every run to be signed as executed", where=signers.file,
                           hint="give --sign-key KEY and --signer NAME")
    if signing is not None:
        problem = signing_problem(signers, signing, "executed", today)
        if problem is not None:
            raise SigningError(f"this key cannot sign the run: {problem}", where=signers.file,
                               hint="use a key listed with the role executor, or update the signers file")
    if refuse_deviations and signers.require["lock"]:
        if not lock_file.is_file():
            return  # the missing lock is refused by lock_for_run with its own message
        target, subject = file_subject(lock_file)
        findings = check_files(target, subject, signers)
        missing = missing_meanings(findings, signers.require["lock"])
        if missing:
            raise SigningError(f"the lock carries no valid {' or '.join(missing)} signature by a trusted signer",
                               where=str(lock_file), hint=problems_hint(findings))


def problems_hint(findings: list[Finding]) -> str:
    shown = [f"{Path(f.where).name}: {f.message}" for f in findings if not f.valid]
    return ("; ".join(shown) + "; " if shown else "") + "sign it with 'planrunner sign LOCK --meaning approved'"


def signature_name(target_name: str, subject: Subject, document: dict[str, Any]) -> str:
    prefix = f"{target_name}.entry-{subject.id}" if subject.kind == "history-entry" else target_name
    return f"{prefix}.{document['meaning']}.{short(document['fingerprint'])}{SIGNATURE_SUFFIX}"


def signed_run_files(signing: SigningKey, record: dict, record_text: str,
                     signed_utc: str) -> tuple[dict[str, str], Callable[[dict], dict]]:
    """The run's 'executed' signature of its record (a file to write into the run folder) and the
    signing of its history entry."""
    subject = Subject("record", "record.json", hashlib.sha256(record_text.encode("utf-8")).hexdigest(),
                      record["run_id"])
    document = make_signature(signing, meaning="executed", signed_utc=signed_utc, subject=subject)

    def sign_entry(entry: dict) -> dict:
        return make_signature(signing, meaning="executed", signed_utc=signed_utc,
                              subject=history_entry_subject(entry, HISTORY_FILE))
    return {signature_name("record.json", subject, document): signature_text(document)}, sign_entry
