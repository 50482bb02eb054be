"""Command line of signing and qualification: keygen, sign, qualify, the signing options of `run`,
and printing signature checks.

Passphrases are read from an environment variable, a file or the terminal, never from the command
line: a run's command line is kept in its record.
"""

from __future__ import annotations

import argparse
import getpass
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from planrunner.errors import SigningError

EXIT_OK, EXIT_INPUT, EXIT_DIFFERS = 0, 2, 3


def add_passphrase_options(verb: argparse.ArgumentParser) -> None:
    verb.add_argument("--passphrase-env", metavar="VAR",
                      help="read the key's passphrase from this environment variable")
    verb.add_argument("--passphrase-file", metavar="FILE",
                      help="read the key's passphrase from the first line of this file")


def add_signing_verbs(verbs: Any) -> None:
    from planrunner.trail.meanings import MEANINGS
    keygen = verbs.add_parser("keygen", help="create an Ed25519 key pair for signing")
    keygen.add_argument("key", help="the private key file to create (the public key goes to KEY.public.json)")
    keygen.add_argument("--name", help="the owner's printed name, kept in the public key file")
    add_passphrase_options(keygen)
    keygen.add_argument("--no-passphrase", action="store_true",
                        help="store the private key unencrypted (protect it by other means)")

    sign = verbs.add_parser("sign", help="sign a record, a lock, a history entry or a qualification pack")
    sign.add_argument("file", help="record.json (or its run folder), PLAN.lock.json, history.jsonl (with --entry) "
                                   "or qualification.json")
    sign.add_argument("--meaning", required=True, choices=MEANINGS, help="what the signature means")
    sign.add_argument("--key", required=True, metavar="KEY", help="the private key file")
    sign.add_argument("--name", required=True, help="the signer's printed name (as in the signers file)")
    sign.add_argument("--entry", type=int, metavar="N", help="with a history.jsonl: the entry (its number) to sign")
    add_passphrase_options(sign)

    qualify = verbs.add_parser("qualify", help="write the qualification pack: installation, operation, traceability")
    qualify.add_argument("--out", metavar="DIR", help="the folder to write qualification.json and .html into")
    qualify.add_argument("--plans", metavar="DIR",
                         help="the folder of the demo plans (default: plans/ of the source tree, when there)")
    qualify.add_argument("--check", metavar="PACK", help="check a pack's own hash and its signatures instead")
    qualify.add_argument("--signers", metavar="FILE", help="with --check: the trusted signers")


def add_run_signing_options(run: argparse.ArgumentParser) -> None:
    run.add_argument("--sign-key", metavar="KEY",
                     help="sign the record and its history entry as executed with this key")
    run.add_argument("--signer", metavar="NAME", help="with --sign-key: the signer's printed name")
    run.add_argument("--signers", metavar="FILE", help="the trusted signers (default: signers.yaml beside the plan)")
    add_passphrase_options(run)


def _passphrase_given(args: argparse.Namespace) -> bytes | None:
    from planrunner.trail.signfiles import passphrase_from
    return passphrase_from(args.passphrase_env, args.passphrase_file)


def _ask(prompt: str) -> bytes:
    return getpass.getpass(prompt).encode("utf-8")


def _terminal_prompt() -> Callable[[str], bytes] | None:
    """Ask for a passphrase only where someone can answer."""
    return _ask if sys.stdin.isatty() else None


def signing_key(key: str, name: str | None, args: argparse.Namespace) -> Any:
    """Unlock the key; ask for the passphrase on a terminal when it needs one and none was given."""
    from planrunner.trail.signfiles import unlock_key
    return unlock_key(key, name, passphrase_env=args.passphrase_env, passphrase_file=args.passphrase_file,
                      ask=_terminal_prompt())


def run_signing(args: argparse.Namespace) -> Any:
    """The run's signing key, or None when the run is not signed."""
    if args.sign_key is None and not args.signer:
        # not signed: the signing module (which loads the record and compile stages) is not needed,
        # and `run` starts its worker processes sooner without it
        return None
    from planrunner.trail.signfiles import run_signing_key
    return run_signing_key(args.sign_key, args.signer, passphrase_env=args.passphrase_env,
                           passphrase_file=args.passphrase_file, ask=_terminal_prompt())


def _keygen(args: argparse.Namespace) -> int:
    from planrunner.trail.signfiles import generate_key
    passphrase = _passphrase_given(args)
    if passphrase is not None and args.no_passphrase:
        raise SigningError("--no-passphrase contradicts the passphrase option")
    if passphrase is None and not args.no_passphrase:
        if not sys.stdin.isatty():
            raise SigningError("a new key needs a passphrase",
                               hint="give --passphrase-env VAR or --passphrase-file FILE, or --no-passphrase")
        passphrase = _ask("passphrase for the new key: ")
        if _ask("the same passphrase again: ") != passphrase:
            raise SigningError("the two passphrases differ; no key was written")
    if passphrase is not None and not passphrase:
        raise SigningError("the passphrase is empty", hint="use --no-passphrase for a key without one")
    made = generate_key(args.key, passphrase=passphrase, name=args.name)
    print(f"private key written to {made.private} (readable by its owner only"
          f"{', encrypted with the passphrase' if passphrase else ', NOT encrypted'})")
    print(f"public key written to {made.public}")
    print(f"fingerprint {made.fingerprint}")
    print("to trust this key, add to signers.yaml beside the plan:")
    print(f"  - name: {args.name or 'NAME'}\n    public_key: {made.public_key}\n    roles: [executor]")
    return EXIT_OK


def _sign(args: argparse.Namespace) -> int:
    from planrunner.pipeline.run import utc_now, utc_stamp
    from planrunner.trail.signatures import make_signature
    from planrunner.trail.signfiles import (
        entry_subject,
        file_subject,
        is_history,
        refuse_rehearsal_signature,
        write_signature,
    )
    if is_history(args.file):
        if args.entry is None:
            raise SigningError("name the history entry to sign", where=args.file, hint="give --entry N")
        target, subject = Path(args.file), entry_subject(Path(args.file), args.entry)
    else:
        if args.entry is not None:
            raise SigningError("--entry is only for a history.jsonl", where=args.file)
        target, subject = file_subject(args.file)
        refuse_rehearsal_signature(target, subject, args.meaning)  # before a passphrase is asked for
    key = signing_key(args.key, args.name, args)
    document = make_signature(key, meaning=args.meaning, signed_utc=utc_stamp(utc_now()), subject=subject)
    written = write_signature(target, subject, document)
    print(f"signed {subject.describe()} as {args.meaning} by {document['signer']} "
          f"(key {document['fingerprint'][:16]}) at {document['signed_utc']}")
    print(f"signature written to {written}")
    return EXIT_OK


def _qualify(args: argparse.Namespace) -> int:
    from planrunner.audit.qualify import build_pack, check_pack, write_pack
    from planrunner.pipeline.run import utc_now
    if args.check:
        return _check_pack(args, check_pack)
    if args.out is None:
        raise SigningError("name the folder for the pack", hint="give --out DIR (or --check PACK)")
    if args.signers:
        raise SigningError("--signers goes with --check")
    plans = Path(args.plans) if args.plans else None
    if plans is not None and not plans.is_dir():
        raise SigningError("not a folder", where=str(plans), hint="name the folder holding the demo plans")
    from planrunner.audit.qualify import default_plans_folder
    pack = write_pack(args.out, build_pack(plans or default_plans_folder(), utc_now))
    doc = pack.document
    iq, op, trace = doc["installation"], doc["operation"], doc["traceability"]
    verdict = {True: "passed", False: "NOT PASSED"}
    print(f"planrunner {doc['planrunner']} qualification on Python {doc['platform']['python']}, "
          f"{doc['platform']['platform']}")
    print(f"installation: {verdict[iq['passed']]}: {iq['checked']} file(s) hashed against the wheel's RECORD"
          + (f"; changed or missing: {', '.join(iq['changed_or_missing'])}" if iq["changed_or_missing"] else "")
          + (f"; not in the RECORD: {', '.join(iq['unlisted'])}" if iq["unlisted"] else ""))
    if iq["note"]:
        print(f"  {iq['note']}")
    unmet = [d for d in doc["dependencies"] if d["meets"] is False]
    print(f"dependencies: {len(doc['dependencies'])} checked"
          + ("".join(f"; {d['name']} {d['installed'] or 'not installed'} does not meet {d['required']}"
                     for d in unmet) if unmet else ", every one meets its requirement"))
    failed = [c for c in op["cases"] if not c["passed"]]
    print(f"operation: {verdict[op['passed']]}: {len(op['cases']) - len(failed)} of {len(op['cases'])} case(s) pass")
    for c in failed:
        error = f" ({c['error']})" if c.get("error") else ""
        print(f"  FAIL {c['id']}: expected {c['expected']}, obtained {c['obtained']}" + error)
    if op["note"]:
        print(f"  {op['note']}")
    print(f"traceability: {verdict[trace['passed']]}: {len(trace['rows'])} README section(s)"
          + (f"; not traced: {', '.join(trace['gaps'])}" if trace["gaps"] else ""))
    print(f"pack written to {pack.json_file} and {pack.html_file} (qualification_sha256 {doc['qualification_sha256']})")
    print("qualification: PASSED" if doc["summary"]["qualified"] else "qualification: NOT PASSED")
    return EXIT_OK if doc["summary"]["qualified"] else EXIT_DIFFERS


def _check_pack(args: argparse.Namespace, check_pack: Callable) -> int:
    from planrunner.audit.signing import SignatureReport
    from planrunner.trail.signatures import missing_meanings
    from planrunner.trail.signfiles import check_files, file_subject, read_signers
    document, intact = check_pack(args.check)
    target, subject = file_subject(Path(args.check) / "qualification.json" if Path(args.check).is_dir() else args.check)
    signers = read_signers(args.signers) if args.signers else None
    findings = check_files(target, subject, signers)
    unsigned = ([f"{target}: no valid {m} signature by a trusted signer"
                 for m in missing_meanings(findings, signers.require["qualification"])] if signers else [])
    signatures = SignatureReport(signers, findings, unsigned)
    print(f"{target}: {'hash matches' if intact else 'HASH DOES NOT MATCH: the pack was changed'}; "
          f"qualified: {'yes' if document.get('summary', {}).get('qualified') else 'NO'}")
    for line in signature_lines(signatures):
        print(line)
    ok = intact and signatures.passed and bool(document.get("summary", {}).get("qualified"))
    return EXIT_OK if ok else EXIT_DIFFERS


def signature_lines(report: Any) -> list[str]:
    """Who signed what and when, and every signature that does not hold or is missing."""
    lines = []
    if report.signers is None:
        lines.append("signatures: no signers file, so no signature can be trusted (none is required)")
    else:
        lines.append(f"signatures checked against {report.signers.file} (sha256 {report.signers.sha256})")
    for f in report.findings:
        head = (f"{f.subject}: {f.meaning} by {f.signer} (key {str(f.fingerprint)[:16]}) at {f.signed_utc}"
                if f.signer is not None else f.subject)
        state = {"valid": "valid", "unchecked": "not trusted", "invalid": "INVALID"}[f.verdict]
        lines.append(f"  {state}: {head}" + ("" if f.valid else f": {f.message} [{f.where}]"))
    for missing in report.unsigned:
        lines.append(f"  UNSIGNED: {missing}")
    if report.signers is not None or report.findings:
        lines.append("signatures: PASSED" if report.passed else "signatures: FAILED")
    return lines


SIGNING_VERBS: dict[str, Callable[[argparse.Namespace], int]] = {"keygen": _keygen, "sign": _sign,
                                                                  "qualify": _qualify}
