"""A record never claims more than happened: report, export and sign refuse a folder that
is still being written, not finished or fails verify (a marked draft aside, never sealed),
reports and exports never change what the manifest or a signature covers, and verify
checks every field of the manifest (every single-bit flip of a real one is caught) and
the form of any signature file.

Live folders are real ``plantrig run`` processes in real time; signatures are real
Ed25519 keys; PDF pages are read back with poppler's pdftotext.
"""

from __future__ import annotations

import base64
import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import h5py
import numpy as np
import pytest
import scipy.io
from rig_text import rig_text

from plantrig.cli import main
from plantrig.sim import load_rig, run_to_folder
from plantrig.sim.records._manifest import (
    DERIVED,
    ManifestError,
    canonical,
    check_signature,
    seal,
    verify_folder,
    write_manifest,
)
from plantrig.sim.records._signoff import DRAFT_MARK

REPO = Path(__file__).resolve().parents[1]
CONVEYOR = REPO / "configs" / "conveyor.toml"


@pytest.fixture(scope="module")
def finished_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder, outcome, _ = run_to_folder(load_rig(CONVEYOR), tmp_path_factory.mktemp("runs"),
                                       realtime=False)
    assert outcome.ended == "completed"
    return folder


@pytest.fixture()
def run_copy(finished_run: Path, tmp_path: Path) -> Path:
    return Path(shutil.copytree(finished_run, tmp_path / finished_run.name))


def realtime_rig(tmp_path: Path, duration: float) -> Path:
    path = tmp_path / "conveyor_rt.toml"
    path.write_text(rig_text(CONVEYOR).replace('mode = "fast"', 'mode = "realtime"')
                    .replace("duration = 3.0", f"duration = {duration}"))
    return path


def start_run(tmp_path: Path, duration: float) -> tuple[subprocess.Popen[bytes], Path]:
    """A real-time ``plantrig run`` in its own process group, once its journal has rows."""
    runs = tmp_path / "runs"
    proc = subprocess.Popen([sys.executable, "-m", "plantrig", "run",
                             str(realtime_rig(tmp_path, duration)), "--out", str(runs)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    try:
        deadline = time.monotonic() + 60
        journal = None
        while journal is None or journal.stat().st_size == 0:
            assert proc.poll() is None, "the run ended before it was recording"
            assert time.monotonic() < deadline, "the run never started recording"
            time.sleep(0.01)
            journal = next(runs.glob("*/ticks.journal"), None) if runs.exists() else None
    except BaseException:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
        raise
    return proc, journal.parent


@pytest.fixture()
def keys(tmp_path: Path) -> Iterator[tuple[str, str]]:
    prefix = tmp_path / "bench-lab"
    assert main(["keygen", "--out", str(prefix)]) == 0
    yield f"{prefix}.private.pem", f"{prefix}.public.pem"


def pdf_pages(path: Path) -> list[str]:
    """The text of every page of a PDF (pdftotext puts a form feed after each page)."""
    text = subprocess.run(["pdftotext", "-layout", str(path), "-"], check=True,
                          capture_output=True, text=True, timeout=60).stdout
    pages = text.split("\f")
    assert pages[-1].strip() == ""
    return pages[:-1]


def assert_draft_everywhere(html_path: Path, pdf_path: Path) -> str:
    page = html_path.read_text()
    assert f"<title>{DRAFT_MARK}" in page and "class='draft-bar'" in page
    # the mark before every section and every image
    assert page.count(f"<p class='draft'>{DRAFT_MARK}</p><h2>") == page.count("<h2>")
    pages = pdf_pages(pdf_path)
    assert len(pages) >= 4
    for i, text in enumerate(pages):
        assert DRAFT_MARK in text, f"page {i + 1} of {pdf_path.name} is not marked"
    return page


def top_level(folder: Path) -> set[str]:
    return {p.name for p in folder.iterdir()}


# -- report / export / sign refuse what is not fit for sign-off ------------------------------

def test_live_run_is_refused_and_its_draft_is_never_sealed(
        tmp_path: Path, keys: tuple[str, str], capsys: pytest.CaptureFixture[str]) -> None:
    proc, folder = start_run(tmp_path, duration=3.0)
    # hold the run mid-way (rig and recorder stopped, alive) so that a loaded machine
    # cannot end it before every command below has seen it live
    os.killpg(proc.pid, signal.SIGSTOP)
    try:
        before = top_level(folder)
        assert "manifest.json" not in before and "summary.json" not in before
        capsys.readouterr()
        assert main(["report", str(folder)]) == 4
        err = capsys.readouterr().err
        assert f"the rig process (pid {proc.pid}) is running" in err
        assert "still being written" in err and "nothing written" in err
        assert main(["export", str(folder), "--csv"]) == 4
        assert main(["sign", str(folder), "--key", keys[0]]) == 4
        assert "still being written" in capsys.readouterr().err
        assert not (folder / DERIVED).exists()
        assert top_level(folder) - before == set()       # nothing written by a refusal
        assert main(["report", str(folder), "--draft"]) == 0
        assert main(["export", str(folder), "--csv", "--mat", "--draft"]) == 0
        out = capsys.readouterr().out
        assert out.count(f"{DRAFT_MARK}: still being written") == 2
        assert not (folder / "manifest.json").exists()
    finally:
        os.killpg(proc.pid, signal.SIGCONT)
        try:
            proc.wait(timeout=120)       # the run ends by itself, its record is finished
        finally:
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGKILL)
    derived = folder / DERIVED
    assert {p.name for p in derived.iterdir()} == {
        "DRAFT-report.html", "DRAFT-report.pdf", "DRAFT-ticks.csv", "DRAFT-events.csv",
        "DRAFT-run.mat"}
    page = assert_draft_everywhere(derived / "DRAFT-report.html", derived / "DRAFT-report.pdf")
    assert "still being written" in page and "Manifest: NONE" in page
    mat = scipy.io.loadmat(derived / "DRAFT-run.mat")
    assert str(mat["status"][0]).startswith(f"{DRAFT_MARK}: still being written")
    # the manifest written at the end of the run does not seal the draft
    manifest = json.loads((folder / "manifest.json").read_text())
    assert not [name for name in manifest["files"] if name.startswith(DERIVED)]
    assert manifest["not_covered"] == [f"{DERIVED}/"]
    capsys.readouterr()
    assert main(["verify", str(folder)]) == 0
    out = capsys.readouterr().out
    assert f"not covered: {DERIVED}/ (5 files" in out
    # the finished folder is fit: a real report beside the draft, the manifest untouched
    sealed = (folder / "manifest.json").read_bytes()
    assert main(["report", str(folder)]) == 0
    assert DRAFT_MARK not in (derived / "report.html").read_text()
    assert (folder / "manifest.json").read_bytes() == sealed
    assert (derived / "DRAFT-report.html").exists()      # a draft is never renamed final


def test_killed_run_is_refused_until_recovered(tmp_path: Path, keys: tuple[str, str],
                                               capsys: pytest.CaptureFixture[str]) -> None:
    proc, folder = start_run(tmp_path, duration=30.0)
    os.killpg(proc.pid, signal.SIGKILL)        # rig and recorder die, the record unfinished
    proc.wait(timeout=30)
    capsys.readouterr()
    for argv in (["report", str(folder)], ["export", str(folder), "--mat"],
                 ["sign", str(folder), "--key", keys[0]]):
        assert main(argv) == 4, argv
        err = capsys.readouterr().err
        assert "not finished: no summary.json" in err and "plantrig recover" in err
        assert "still being written" not in err          # nothing of it runs any more
    assert not (folder / DERIVED).exists()
    assert main(["recover", str(folder)]) == 0
    assert main(["report", str(folder)]) == 0
    assert main(["sign", str(folder), "--key", keys[0]]) == 0
    assert main(["verify", str(folder), "--public-key", keys[1]]) == 0


def test_tampered_folder_is_refused_and_its_draft_says_why(
        run_copy: Path, keys: tuple[str, str], capsys: pytest.CaptureFixture[str]) -> None:
    # hide the belt's top speed inside run.h5 (h5py edits the dataset in place)
    with h5py.File(run_copy / "run.h5", "r+") as f:
        speed = f["ticks/outputs/belt_speed"]
        peak = float(np.max(speed[()]))
        speed[...] = np.minimum(speed[()], 0.5 * peak)
    capsys.readouterr()
    assert main(["report", str(run_copy)]) == 1
    err = capsys.readouterr().err
    assert "fails verify: 1 changed (run.h5)" in err and "nothing written" in err
    assert main(["export", str(run_copy), "--csv"]) == 1
    assert main(["sign", str(run_copy), "--key", keys[0]]) == 1
    assert "fails verify" in capsys.readouterr().err
    assert not (run_copy / DERIVED).exists() and not (run_copy / "manifest.sig").exists()
    assert main(["report", str(run_copy), "--draft"]) == 0
    derived = run_copy / DERIVED
    page = assert_draft_everywhere(derived / "DRAFT-report.html",
                                   derived / "DRAFT-report.pdf")
    assert "fails verify: 1 changed (run.h5)" in page
    assert "FAILS VERIFY: the hashes below are as listed, not as found" in page
    assert "verify at report time</td><td class='hash'>FAILED" in page
    assert not (derived / "report.html").exists()


def test_unfinished_record_with_a_journal_is_refused(run_copy: Path,
                                                     capsys: pytest.CaptureFixture[str]
                                                     ) -> None:
    # a run whose finish stopped half-way (disk full) keeps its journal for recover
    (run_copy / "ticks.journal").write_bytes(b"\0" * 64)
    write_manifest(run_copy)
    capsys.readouterr()
    assert main(["report", str(run_copy)]) == 4
    assert "ticks.journal was never turned into the record" in capsys.readouterr().err


def test_reports_and_exports_never_touch_the_manifest_or_its_signature(
        run_copy: Path, keys: tuple[str, str], capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["sign", str(run_copy), "--key", keys[0]]) == 0
    manifest, signature = ((run_copy / n).read_bytes() for n in ("manifest.json",
                                                                 "manifest.sig"))
    digest = hashlib.sha256(manifest).hexdigest()
    capsys.readouterr()
    assert main(["report", str(run_copy), "--public-key", keys[1], "--operator",
                 "R. Okafor"]) == 0
    assert main(["export", str(run_copy), "--csv", "--mat"]) == 0
    out = capsys.readouterr().out
    assert "signature was removed" not in out and DRAFT_MARK not in out
    assert (run_copy / "manifest.json").read_bytes() == manifest
    assert (run_copy / "manifest.sig").read_bytes() == signature
    assert main(["verify", str(run_copy), "--public-key", keys[1]]) == 0
    out = capsys.readouterr().out
    assert f"manifest.json SHA-256: {digest}" in out and "signature: valid" in out
    page = (run_copy / DERIVED / "report.html").read_text()
    assert f"manifest.json SHA-256</td><td class='hash'>{digest}" in page
    assert "<td class='hash'>valid; key fingerprint" in page
    # the acceptance rules as judged after the run, from the summary
    assert "<td>ran to the end</td><td>held: 3000 of 3000 ticks" in page
    assert "<td>exit code</td><td>0</td>" in page
    assert DRAFT_MARK not in page
    text = "\n".join(pdf_pages(run_copy / DERIVED / "report.pdf"))
    assert digest in text.replace(" ", "").replace("\n", "") and DRAFT_MARK not in text
    mat = scipy.io.loadmat(run_copy / DERIVED / "run.mat")
    assert str(mat["status"][0]) == f"verified record, manifest.json SHA-256 {digest}"
    # a second signer does not silently replace the first signature
    assert main(["sign", str(run_copy), "--key", keys[0]]) == 2
    assert "already signed" in capsys.readouterr().err


def test_output_inside_the_record_is_refused(run_copy: Path,
                                             capsys: pytest.CaptureFixture[str]) -> None:
    capsys.readouterr()
    assert main(["export", str(run_copy), "--csv", "--out", str(run_copy / "export")]) == 2
    assert "inside the run folder but not in derived/" in capsys.readouterr().err
    assert not (run_copy / "export").exists()
    assert main(["export", str(run_copy), "--csv", "--out",
                 str(run_copy.parent / "elsewhere")]) == 0
    assert (run_copy.parent / "elsewhere" / "ticks.csv").exists()
    assert main(["verify", str(run_copy)]) == 0


def test_not_a_run_folder_or_no_key_is_a_usage_mistake(
        run_copy: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    empty = tmp_path / "empty"
    empty.mkdir()
    capsys.readouterr()
    for argv in (["report", str(empty)], ["export", str(empty), "--csv"],
                 ["sign", str(empty), "--key", "k.pem"]):
        assert main(argv) == 2
        assert "not a plantrig run folder" in capsys.readouterr().err
    assert main(["report", str(run_copy), "--public-key", str(tmp_path / "nope.pem")]) == 2
    assert "no such key file" in capsys.readouterr().err
    assert not empty.joinpath(DERIVED).exists() and not run_copy.joinpath(DERIVED).exists()


def test_help_documents_the_refusals_and_exit_codes(capsys: pytest.CaptureFixture[str]
                                                    ) -> None:
    for command in ("report", "export", "sign"):
        with pytest.raises(SystemExit) as done:
            main([command, "--help"])
        assert done.value.code == 0
        text = " ".join(capsys.readouterr().out.split())
        assert "exit codes:" in text and "4 the folder is still being written" in text
        assert "1 the folder fails verify" in text
        if command != "sign":
            assert "--draft" in text and DRAFT_MARK in text


# -- the manifest: every field checked ----------------------------------------------------

def test_every_single_bit_flip_of_a_real_manifest_fails_verify(run_copy: Path) -> None:
    path = run_copy / "manifest.json"
    original = path.read_bytes()
    assert 1000 <= len(original) <= 2500
    assert verify_folder(run_copy).ok
    caught = 0
    try:
        for i in range(len(original)):
            for bit in range(8):
                damaged = bytearray(original)
                damaged[i] ^= 1 << bit
                path.write_bytes(bytes(damaged))
                try:
                    passed = verify_folder(run_copy).ok
                except ManifestError:
                    passed = False
                assert not passed, f"byte {i} bit {bit} flipped passes verify"
                caught += 1
    finally:
        path.write_bytes(original)
    assert caught == 8 * len(original)
    print(f"\n{caught} of {caught} single-bit flips of a {len(original)}-byte manifest "
          "fail verify")
    assert verify_folder(run_copy).ok


def reseal(folder: Path, **changes: object) -> None:
    """Rewrite manifest.json with ``changes`` and a correct self hash, as someone
    editing it deliberately would: only the field checks can catch it."""
    doc = json.loads((folder / "manifest.json").read_text())
    doc.update(changes)
    (folder / "manifest.json").write_bytes(seal(doc))


@pytest.mark.parametrize(("changes", "message"), [
    ({"version": 1}, "version 1; this plantrig reads version 2"),
    ({"format": "some manifest"}, "format 'some manifest'"),
    ({"algorithm": "md5"}, "algorithm 'md5'"),
    ({"created_utc": "2999-01-01T00:00:00+00:00"}, "is in the future"),
    ({"created_utc": "2000-01-01T00:00:00+00:00"}, "is before the run started"),
    ({"created_utc": "2026-12-01 22:26:53"}, "is not a UTC time"),
    ({"not_covered": ["derived/", "run.h5"]}, "not_covered"),
])
def test_a_rewritten_manifest_field_is_caught(run_copy: Path, changes: dict[str, object],
                                              message: str) -> None:
    reseal(run_copy, **changes)
    with pytest.raises(ManifestError, match=message.replace("(", r"\(")):
        verify_folder(run_copy)


def test_file_sizes_and_entries_are_compared(run_copy: Path,
                                             capsys: pytest.CaptureFixture[str]) -> None:
    files = json.loads((run_copy / "manifest.json").read_text())["files"]
    reseal(run_copy, files={**files, "run.h5": {**files["run.h5"],
                                                "bytes": files["run.h5"]["bytes"] + 1}})
    result = verify_folder(run_copy)
    assert result.changed == ["run.h5"] and not result.ok
    for entry, message in (({"sha256": "AB" * 32, "bytes": 1}, "lower-case hex"),
                           ({"sha256": "ab" * 32, "bytes": -1}, "is not a size"),
                           ({"sha256": "ab" * 32, "bytes": True}, "is not a size"),
                           ({"bytes": 1, "sha256": "ab" * 32}, "expected sha256 and bytes")):
        reseal(run_copy, files={**files, "rig.toml": entry})
        with pytest.raises(ManifestError, match=message):
            verify_folder(run_copy)
    reseal(run_copy, files={**files, f"{DERIVED}/report.html": files["rig.toml"]})
    with pytest.raises(ManifestError, match="cannot be in a manifest"):
        verify_folder(run_copy)
    capsys.readouterr()
    assert main(["verify", str(run_copy)]) == 1
    assert "FAILED" in capsys.readouterr().err


# -- the signature file ---------------------------------------------------------------------

def test_garbage_signature_fails_verify_without_a_key(run_copy: Path, keys: tuple[str, str],
                                                      capsys: pytest.CaptureFixture[str]
                                                      ) -> None:
    sig = run_copy / "manifest.sig"
    good = {"algorithm": "ed25519", "signed": "manifest.json",
            "public_key_sha256": "ab" * 32,
            "signature": base64.b64encode(bytes(64)).decode()}
    padded_wrong = base64.b64encode(bytes(64)).decode()[:-3] + "B=="   # unused bits set
    garbage = [os.urandom(200), b"", b"{}", b"null", b"not json at all\n",
               canonical({**good, "signature": base64.b64encode(bytes(63)).decode()}),
               canonical({**good, "signature": "!!" + good["signature"][2:]}),
               canonical({**good, "signature": padded_wrong}),
               canonical({**good, "algorithm": "rsa"}),
               canonical({**good, "public_key_sha256": "xyz"}),
               canonical({**good, "extra": 1}),
               json.dumps(good).encode()]                     # not canonical text
    for data in garbage:
        sig.write_bytes(data)
        capsys.readouterr()
        assert main(["verify", str(run_copy)]) == 1, data[:60]
        assert "signature: malformed" in capsys.readouterr().out
    sig.write_bytes(canonical(good))    # well formed, unchecked without a key
    assert main(["verify", str(run_copy)]) == 0
    assert main(["verify", str(run_copy), "--public-key", keys[1]]) == 1


def test_every_single_bit_flip_of_a_real_signature_fails_under_its_key(
        run_copy: Path, keys: tuple[str, str]) -> None:
    assert main(["sign", str(run_copy), "--key", keys[0]]) == 0
    path = run_copy / "manifest.sig"
    original = path.read_bytes()
    assert verify_folder(run_copy, Path(keys[1])).signature == "valid"

    def signature_state() -> str:      # the signature step of verify_folder, alone
        try:
            return check_signature(run_copy, Path(keys[1]))[0]
        except ManifestError:
            return "malformed"

    try:
        for i in range(len(original)):
            for bit in range(8):
                damaged = bytearray(original)
                damaged[i] ^= 1 << bit
                path.write_bytes(bytes(damaged))
                assert signature_state() in ("invalid", "malformed"), (
                    f"byte {i} bit {bit} flipped passes")
                if i == len(original) // 2 and bit == 0:      # and verify says so too
                    assert not verify_folder(run_copy, Path(keys[1])).ok
    finally:
        path.write_bytes(original)
    assert verify_folder(run_copy, Path(keys[1])).ok


def test_a_public_key_that_cannot_be_used_is_the_commands_mistake(
        run_copy: Path, keys: tuple[str, str], tmp_path: Path,
        capsys: pytest.CaptureFixture[str]) -> None:
    # a missing, garbled or non-Ed25519 key says nothing of the folder: exit 2, and the
    # folder is not declared FAILED
    from cryptography.hazmat.primitives import serialization
    from cryptography.hazmat.primitives.asymmetric import rsa

    assert main(["sign", str(run_copy), "--key", keys[0]]) == 0
    rsa_key = tmp_path / "rsa.public.pem"
    rsa_key.write_bytes(rsa.generate_private_key(public_exponent=65537, key_size=2048)
                        .public_key().public_bytes(
                            serialization.Encoding.PEM,
                            serialization.PublicFormat.SubjectPublicKeyInfo))
    garbled = tmp_path / "garbled.pem"
    garbled.write_text("-----BEGIN PUBLIC KEY-----\nnot base64\n-----END PUBLIC KEY-----\n")
    for key, words in ((tmp_path / "nope.pem", "cannot read key"),
                       (garbled, "not a PEM public key"),
                       (rsa_key, "not an Ed25519 public key")):
        capsys.readouterr()
        assert main(["verify", str(run_copy), "--public-key", str(key)]) == 2, key
        err = capsys.readouterr().err
        assert words in err and "FAILED" not in err
    assert main(["verify", str(run_copy), "--public-key", keys[1]]) == 0
