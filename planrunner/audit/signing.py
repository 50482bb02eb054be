"""Checking the signatures of a record, its lock and a run history against the trusted signers.

`verify` and `history` call these before anything else: who signed what and when, every signature
that does not hold (forged, moved from another document, an untrusted, removed or expired signer, a
role the signer does not have), and every signature the signers file requires that is missing.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from planrunner.record.rehearsal import STAMP as REHEARSAL_STAMP
from planrunner.record.rehearsal import is_rehearsal
from planrunner.trail.signatures import Finding, Signers, check_signature, history_entry_subject, missing_meanings
from planrunner.trail.signfiles import (
    REHEARSAL_MEANINGS,
    SIGNERS_FILE,
    check_files,
    file_subject,
    find_signers,
    history_entries,
    read_signers,
)


@dataclass(frozen=True)
class SignatureReport:
    signers: Signers | None
    findings: list[Finding]  # every signature found, as checked
    unsigned: list[str]  # each required signature that no valid one provides, located

    @property
    def passed(self) -> bool:
        return not self.unsigned and all(f.verdict != "invalid" for f in self.findings)


def record_signatures(record_file: Path, plan_file: Path, signers_file: str | Path | None) -> SignatureReport:
    """The signatures of a record and of the lock it was compared with (the lock beside the plan)."""
    signers = find_signers(plan_file.parent, signers_file)
    target, subject = file_subject(record_file)
    findings = check_files(target, subject, signers)
    unsigned = []
    if signers is not None:
        unsigned += [f"{target}: no valid {m} signature by a trusted signer (the record is unsigned or "
                     "was rewritten after it was signed)"
                     for m in missing_meanings(findings, signers.require["record"])]
    record = json.loads(target.read_text(encoding="utf-8"))
    if is_rehearsal(record):  # a signature made before the refusal, or by hand: never accepted
        unsigned += [f"{f.where}: a rehearsal's record signed as {f.meaning}; a rehearsal is never a result "
                     f"({REHEARSAL_STAMP})" for f in findings if f.meaning not in REHEARSAL_MEANINGS]
    lock = (record.get("plan") or {}).get("lock")
    if isinstance(lock, dict) and isinstance(lock.get("file"), str):
        lock_file = plan_file.parent / lock["file"]
        if lock_file.is_file():
            lock_target, lock_subject = file_subject(lock_file)
            now = json.loads(lock_target.read_text(encoding="utf-8")).get("lock_sha256")
            if now != lock.get("lock_sha256"):
                unsigned.append(f"{lock_file}: not the lock this run was compared with (lock_sha256 "
                                f"{now}, recorded {lock.get('lock_sha256')})")
            lock_findings = check_files(lock_target, lock_subject, signers)
            findings += lock_findings
            if signers is not None:
                unsigned += [f"{lock_file}: no valid {m} signature by a trusted signer"
                             for m in missing_meanings(lock_findings, signers.require["lock"])]
        elif signers is not None and signers.require["lock"]:
            unsigned.append(f"{lock_file}: the lock is not there, so its required signatures cannot be checked")
    return SignatureReport(signers, findings, unsigned)


def _history_signers(log: Path, signers_file: str | Path | None) -> Signers | None:
    """The named signers file, else signers.yaml beside the log or in the folder above (the plan's)."""
    if signers_file is not None:
        return read_signers(signers_file)
    for folder in (log.parent, log.parent.parent):
        if (folder / SIGNERS_FILE).is_file():
            return read_signers(folder / SIGNERS_FILE)
    return None


def history_signatures(log: Path, signers_file: str | Path | None) -> SignatureReport:
    """The signature each history entry carries, any signature files for an entry, and what is missing."""
    signers = _history_signers(log, signers_file)
    findings: list[Finding] = []
    unsigned: list[str] = []
    entries = history_entries(log) if log.is_file() else []
    for entry in entries:
        subject = history_entry_subject(entry, log.name)
        where = f"{log}:{entry['_line']}"
        mine = []
        if "signature" in entry:
            mine.append(check_signature(entry["signature"], subject, signers, where))
        mine += check_files(log, subject, signers)
        findings += mine
        if signers is not None:
            unsigned += [f"{where}: entry {entry.get('seq')} (run {entry.get('run_id')}) has no valid {m} signature "
                         "by a trusted signer (unsigned, or rewritten after it was signed)"
                         for m in missing_meanings(mine, signers.require["history-entry"])]
    return SignatureReport(signers, findings, unsigned)

