"""The qualification pack: from the installed wheel it passes; a changed installed file fails it; it
is hashed and can be signed; from a development checkout it says why the installation is not
qualified."""

from __future__ import annotations

import base64
import hashlib
import json
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from planrunner.audit.qualify import _record_digest
from planrunner.audit.selfcheck import CASES
from planrunner.audit.trace import readme_sections
from planrunner.cli import main as cli
from planrunner.record.canonical import self_hash

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def wheel_site(tmp_path_factory) -> Path:
    """The wheel built from this tree, unpacked as an installation (its dist-info holds the RECORD)."""
    folder = tmp_path_factory.mktemp("wheel")
    built = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
                            "-w", str(folder / "wheel"), str(ROOT)], capture_output=True, text=True)
    assert built.returncode == 0, built.stderr[-2000:]
    site = folder / "site"
    zipfile.ZipFile(next((folder / "wheel").glob("planrunner-*.whl"))).extractall(site)
    return site


def qualify_from(site: Path, cwd: Path, *args: str) -> subprocess.CompletedProcess:
    cwd.mkdir(exist_ok=True)
    return subprocess.run([sys.executable, "-m", "planrunner", "qualify", *args], cwd=cwd, capture_output=True,
                          text=True, env={"PYTHONPATH": str(site), "PATH": "/usr/bin:/bin"})


@pytest.fixture(scope="module")
def wheel_pack(wheel_site, tmp_path_factory) -> Path:
    work = tmp_path_factory.mktemp("qualify")
    done = qualify_from(wheel_site, work, "--out", "pack", "--plans", str(ROOT / "plans"))
    assert done.returncode == 0, done.stdout + done.stderr
    return work / "pack"


def test_record_digest_is_urlsafe_base64_without_padding():
    # PEP 376/427: sha256 of the empty file, urlsafe base64, padding stripped  # identity (definition)
    expected = base64.urlsafe_b64encode(hashlib.sha256(b"").digest()).decode().rstrip("=")
    assert _record_digest(b"", "sha256") == expected == "47DEQpj8HBSa-_TImW-5JCeuQeRkm5NMpJWZG3hSuFU"


def test_the_pack_from_the_installed_wheel_passes(wheel_pack):
    doc = json.loads((wheel_pack / "qualification.json").read_text(encoding="utf-8"))
    assert doc["qualification_sha256"] == self_hash(doc, "qualification_sha256")
    assert doc["summary"] == {"installation": True, "dependencies": True, "operation": True,
                              "traceability": True, "qualified": True}
    iq = doc["installation"]
    hashed = [f for f in iq["files"] if f["obtained"] is not None]
    assert any(f["path"] == "planrunner/engines/bootstrap.py" for f in hashed)
    assert all(f["status"] == "matches" and f["obtained"] == f["expected"] for f in hashed)
    assert not iq["unlisted"] and iq["note"] is None
    names = {d["name"].lower() for d in doc["dependencies"]}
    assert {"numpy", "scipy", "cryptography", "pandas"} <= names and all(d["meets"] for d in doc["dependencies"])
    cases = doc["operation"]["cases"]
    demos = [c for c in cases if c["kind"] == "demo plan"]
    assert [c["id"] for c in demos] == ["demo liner-trial", "demo monthly-fill", "demo ward-hygiene",
                                                "demo seal-endurance"]
    assert all(c["obtained"] == 0 and c["numbers_compared"] > 0 for c in demos)
    assert {c.id for c in CASES} <= {c["id"] for c in cases if c["kind"] == "self-check"}
    for case in cases:
        assert {"source", "expected", "obtained", "tolerance"} <= set(case) and case["passed"]
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert [r["section"] for r in doc["traceability"]["rows"]] == [h for h, _ in readme_sections(readme)]
    html = (wheel_pack / "qualification.html").read_text(encoding="utf-8")
    assert doc["qualification_sha256"] in html and "Traceability" in html and CASES[0].id in html


def test_a_changed_installed_file_fails_the_installation_qualification(wheel_site, tmp_path):
    site = tmp_path / "site"
    shutil.copytree(wheel_site, site)
    changed = site / "planrunner" / "engines" / "bootstrap.py"
    changed.write_text(changed.read_text(encoding="utf-8") + "\n# edited after installation\n", encoding="utf-8")
    (site / "planrunner" / "extra.py").write_text("x = 1\n", encoding="utf-8")
    (tmp_path / "no-plans").mkdir()
    done = qualify_from(site, tmp_path / "work", "--out", "pack", "--plans", str(tmp_path / "no-plans"))
    assert done.returncode == 3, done.stdout + done.stderr
    assert "installation: NOT PASSED" in done.stdout
    assert "changed or missing: planrunner/engines/bootstrap.py" in done.stdout
    assert "not in the RECORD: planrunner/extra.py" in done.stdout
    doc = json.loads((tmp_path / "work" / "pack" / "qualification.json").read_text(encoding="utf-8"))
    row = next(f for f in doc["installation"]["files"] if f["path"] == "planrunner/engines/bootstrap.py")
    assert row["status"] == "CHANGED" and row["obtained"] != row["expected"]


def test_a_signed_pack_and_an_edited_pack(wheel_pack, tmp_path, capsys):
    pack = tmp_path / "pack"
    shutil.copytree(wheel_pack, pack)
    key = tmp_path / "qa.key"
    assert cli.main(["keygen", str(key), "--name", "QA", "--no-passphrase"]) == 0
    public = json.loads((tmp_path / "qa.key.public.json").read_text(encoding="utf-8"))["public_key"]
    signers = tmp_path / "signers.yaml"
    signers.write_text(f"format: planrunner.signers/1\nsigners:\n  - name: QA\n    public_key: {public}\n"
                       "    roles: [approver]\nrequire:\n  record: []\n  history: []\n  qualification: [approved]\n",
                       encoding="utf-8")
    code = cli.main(["qualify", "--check", str(pack), "--signers", str(signers)])
    out = capsys.readouterr().out
    assert code == 3 and "UNSIGNED" in out and "no valid approved signature" in out
    assert cli.main(["sign", str(pack / "qualification.json"), "--meaning", "approved", "--key", str(key),
                     "--name", "QA"]) == 0
    capsys.readouterr()
    code = cli.main(["qualify", "--check", str(pack), "--signers", str(signers)])
    out = capsys.readouterr().out
    assert code == 0 and "hash matches" in out and "valid: qualification qualification.json" in out
    document = json.loads((pack / "qualification.json").read_text(encoding="utf-8"))
    document["platform"]["processor"] = "another processor"
    (pack / "qualification.json").write_text(json.dumps(document), encoding="utf-8")
    code = cli.main(["qualify", "--check", str(pack), "--signers", str(signers)])
    out = capsys.readouterr().out
    assert code == 3 and "HASH DOES NOT MATCH" in out
    document["qualification_sha256"] = self_hash(document, "qualification_sha256")
    (pack / "qualification.json").write_text(json.dumps(document), encoding="utf-8")
    code = cli.main(["qualify", "--check", str(pack), "--signers", str(signers)])
    out = capsys.readouterr().out
    assert code == 3 and "hash matches" in out and "changed after it was signed" in out


def test_the_pack_from_a_development_checkout(tmp_path, capsys):
    (tmp_path / "no-plans").mkdir()
    code = cli.main(["qualify", "--out", str(tmp_path / "pack"), "--plans", str(tmp_path / "no-plans")])
    out = capsys.readouterr().out
    assert code == 3 and "installation: NOT PASSED" in out
    assert "editable (development) install" in out or "not from the installed wheel" in out
    assert "traceability: passed" in out and "missing demo plans" in out
    code = cli.main(["qualify", "--out", str(tmp_path / "pack")])
    assert code == 2 and "never replaced" in capsys.readouterr().err
    code = cli.main(["qualify"])
    assert code == 2 and "--out DIR" in capsys.readouterr().err
