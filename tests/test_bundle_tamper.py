"""Tampered bundles must fail ``box.py check`` with a reason, never run planted code, never block.

Outside references: the Linux file system (os.mkfifo, /dev/zero, symbolic links) for the file
kinds; Python's own import rules (a script's folder is first on sys.path: "The Python Tutorial"
6.1.2, common practice) for the planted modules, shown to run when a plain script in the same
folder imports them (the checker of the checker); the ``cryptography`` package (OpenSSL's
Ed25519, RFC 8032) for the signatures: it verifies every manifest.sig that boxwood writes, and
its keys sign the tampered cases. Each tamper case is one of issue 11's list.
"""
from __future__ import annotations

import json
import os
import shutil
import stat
import subprocess
import sys
from pathlib import Path

import joblib
import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from boxwood import micropython as mp
from boxwood.bundle import write_manifest
from boxwood.cli import main

TIMEOUT = 120  # a FIFO must not block: the run is killed (and the test fails) if it does


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    """A small signed bundle (10 trees of depth 2 on diabetes: Efron et al. 2004), an unsigned
    one, the key pair, and a second key pair the box does not trust."""
    from sklearn.datasets import load_diabetes
    from sklearn.ensemble import GradientBoostingRegressor

    tmp = tmp_path_factory.mktemp("tamper")
    X, y = load_diabetes(return_X_y=True)
    joblib.dump(GradientBoostingRegressor(n_estimators=10, max_depth=2, random_state=0).fit(X, y), tmp / "a.joblib")
    joblib.dump(GradientBoostingRegressor(n_estimators=5, max_depth=3, random_state=1).fit(X, y), tmp / "b.joblib")
    assert main(["keygen", "-o", str(tmp / "keys" / "owner")]) == 2  # no such folder: exit 2, nothing written
    (tmp / "keys").mkdir()
    assert main(["keygen", "-o", str(tmp / "keys" / "owner")]) == 0
    assert main(["keygen", "-o", str(tmp / "keys" / "other")]) == 0
    common = ["--micropython-footprint", "skip"]
    assert main(["bundle", str(tmp / "a.joblib"), "-o", str(tmp / "signed"), "--sign",
                 str(tmp / "keys" / "owner.key")] + common) == 0
    assert main(["bundle", str(tmp / "a.joblib"), "-o", str(tmp / "plain")] + common) == 0
    assert main(["bundle", str(tmp / "b.joblib"), "-o", str(tmp / "other_model")] + common) == 0
    return tmp


def copy_of(src, tmp_path, name="copy"):
    target = tmp_path / name
    shutil.copytree(src, target, symlinks=True)
    return target


def box(folder, *args, isolated=False, script=None):
    """box.py run as a device owner would: ``python3 box.py ...`` (not isolated: the script's
    folder is first on the import path, which is what box.py must undo)."""
    env = {"PATH": os.environ.get("PATH", "/usr/bin:/bin")}
    flags = ["-I", "-S"] if isolated else []
    return subprocess.run([sys.executable] + flags + [str(script or Path(folder) / "box.py")] + list(args),
                          capture_output=True, text=True, env=env, timeout=TIMEOUT, cwd=str(Path(folder).parent))


def failed(done, reason):
    assert done.returncode == 1, (done.stdout, done.stderr)
    assert done.stderr.startswith("box.py: check failed: ") and reason in done.stderr, done.stderr
    assert "Traceback" not in done.stderr


def edit_manifest(folder, change):
    path = folder / "manifest.json"
    doc = json.loads(path.read_bytes())
    change(doc)
    path.write_text(json.dumps(doc))


# ----------------------------------------------------------------------------- planted modules
PLANT = "open(%r, 'w').write('ran')\nraise SystemExit('planted module %s ran')\n"


@pytest.mark.parametrize("module", ["json", "hashlib", "os", "io", "binascii", "csv", "scorer", "stream",
                                    "signature"])
def test_a_planted_module_never_runs(made, tmp_path, module):
    folder = copy_of(made / "plain", tmp_path)
    marker = tmp_path / ("ran_" + module)
    planted = folder / (module + ".py")
    if planted.exists():  # scorer, stream, signature: a changed copy instead of an extra file
        planted.write_text(PLANT % (str(marker), module) + planted.read_text())
    else:
        planted.write_text(PLANT % (str(marker), module))
    # the checker of the checker: a plain script in that folder does run the planted module
    if module not in ("os", "io"):  # loaded by the interpreter before any script runs
        probe = tmp_path / "probe_dir"
        probe.mkdir()
        shutil.copy(planted, probe / planted.name)
        (probe / "probe.py").write_text("import %s\n" % module)
        subprocess.run([sys.executable, str(probe / "probe.py")], capture_output=True, timeout=TIMEOUT)
        assert marker.exists()
        marker.unlink()
    for args in (["check"], ["info"], ["score", "-"], ["--version"]):
        done = box(folder, *args)
        assert not marker.exists(), (args, done.stderr)
        assert "planted module" not in done.stderr and "Traceback" not in done.stderr
    if module in ("scorer", "stream", "signature"):
        failed(box(folder, "check"), "%s.py is larger than the" % module)
    else:
        failed(box(folder, "check"), "%s.py is in the folder but not listed in manifest.json" % module)


def test_untouched_bundle_passes_plain_and_isolated(made):
    for isolated in (False, True):
        done = box(made / "plain", "check", isolated=isolated)
        assert done.returncode == 0 and done.stdout.startswith("ok: 6 files match manifest.json"), done.stderr
    assert not (made / "plain" / "__pycache__").exists()  # nothing was imported from the folder


# ----------------------------------------------------------------------------- file kinds
def test_fifo_manifest_does_not_block(made, tmp_path):
    folder = copy_of(made / "plain", tmp_path)
    (folder / "manifest.json").unlink()
    os.mkfifo(folder / "manifest.json")
    failed(box(folder, "check"), "manifest.json is a FIFO (named pipe), not a regular file")


def test_fifo_in_place_of_a_listed_file_does_not_block(made, tmp_path):
    folder = copy_of(made / "plain", tmp_path)
    (folder / "stream.py").unlink()
    os.mkfifo(folder / "stream.py")
    failed(box(folder, "check"), "stream.py is a FIFO (named pipe), not a regular file")


@pytest.mark.parametrize("name", ["manifest.json", "model.json", "README.txt"])
def test_link_to_dev_zero_is_not_read(made, tmp_path, name):
    assert stat.S_ISCHR(os.stat("/dev/zero").st_mode)  # the reference: a character device that never ends
    folder = copy_of(made / "plain", tmp_path)
    (folder / name).unlink()
    os.symlink("/dev/zero", folder / name)
    failed(box(folder, "check"), "%s is a character device, not a regular file" % name)


def test_folder_where_a_file_is_expected(made, tmp_path):
    folder = copy_of(made / "plain", tmp_path)
    (folder / "scorer.py").unlink()
    (folder / "scorer.py").mkdir()
    failed(box(folder, "check"), "scorer.py is a folder, not a regular file")


def test_a_file_grown_past_its_listed_size(made, tmp_path):
    folder = copy_of(made / "plain", tmp_path)
    with open(folder / "README.txt", "ab") as fh:
        fh.write(b"x" * 100000)
    failed(box(folder, "check"), "README.txt is larger than the")  # from stat, before any read


def test_huge_manifest_is_not_read(made, tmp_path):
    folder = copy_of(made / "plain", tmp_path)
    with open(folder / "manifest.json", "ab") as fh:
        fh.write(b" " * (1 << 20))
    failed(box(folder, "check"), "manifest.json has")


# ----------------------------------------------------------------------------- the file list
def test_extra_file_fails(made, tmp_path):
    folder = copy_of(made / "plain", tmp_path)
    (folder / "notes.txt").write_text("hello")
    failed(box(folder, "check"), "notes.txt is in the folder but not listed in manifest.json")
    (folder / "notes.txt").unlink()
    (folder / "sub").mkdir()
    failed(box(folder, "check"), "sub is in the folder but not listed")


def test_missing_file_fails(made, tmp_path):
    folder = copy_of(made / "plain", tmp_path)
    (folder / "README.txt").unlink()
    failed(box(folder, "check"), "missing file: README.txt (listed in manifest.json)")


def test_file_missing_from_the_list_fails(made, tmp_path):
    folder = copy_of(made / "plain", tmp_path)
    edit_manifest(folder, lambda d: d["files"].pop("README.txt"))
    failed(box(folder, "check"), "README.txt is in the folder but not listed in manifest.json")
    folder = copy_of(made / "plain", tmp_path, "copy2")
    edit_manifest(folder, lambda d: d["files"].pop("stream.py"))
    (folder / "stream.py").unlink()
    failed(box(folder, "check"), "manifest.json does not list stream.py")


# ----------------------------------------------------------------------------- wrong types, nesting
WRONG = {
    "artefact_file_list": (lambda d: d["artefact"].__setitem__("file", ["model.json"]),
                           "artefact.file must be a file name, got a list"),
    "artefact_file_object": (lambda d: d["artefact"].__setitem__("file", {"a": 1}),
                             "artefact.file must be a file name, got an object"),
    "digest_number": (lambda d: d["artefact"].__setitem__("digest", 5), "artefact.digest must be a text"),
    "scorer_version_list": (lambda d: d.__setitem__("scorer_version", [1]), "scorer_version must be a text"),
    "bytes_text": (lambda d: d["files"]["box.py"].__setitem__("bytes", "12"), "bad entry for 'box.py'"),
    "bytes_true": (lambda d: d["files"]["box.py"].__setitem__("bytes", True), "bad entry for 'box.py'"),
    "bytes_negative": (lambda d: d["files"]["box.py"].__setitem__("bytes", -1), "bad entry for 'box.py'"),
    "bytes_huge": (lambda d: d["files"]["box.py"].__setitem__("bytes", 10 ** 40), "bad entry for 'box.py'"),
    "sha_number": (lambda d: d["files"]["box.py"].__setitem__("sha256", 7), "bad entry for 'box.py'"),
    "sha_short": (lambda d: d["files"]["box.py"].__setitem__("sha256", "ab"), "bad entry for 'box.py'"),
    "entry_list": (lambda d: d["files"].__setitem__("box.py", [1, 2]), "bad entry for 'box.py'"),
    "files_list": (lambda d: d.__setitem__("files", ["box.py"]), "lacks its file list"),
    "version_true": (lambda d: d.__setitem__("bundle_format_version", True), "bundle format version True"),
    "not_object": (lambda d: d.clear(), "not a boxwood bundle manifest"),
    "signature_listed": (lambda d: d["files"].__setitem__("manifest.sig", d["files"]["box.py"]),
                         "bad entry for 'manifest.sig'"),
}


@pytest.mark.parametrize("case", sorted(WRONG))
def test_wrong_types_fail_with_a_reason(made, tmp_path, case):
    folder = copy_of(made / "plain", tmp_path)
    change, reason = WRONG[case]
    edit_manifest(folder, change)
    failed(box(folder, "check"), reason)


@pytest.mark.parametrize("depth", [17, 990, 100000])
def test_deep_nesting_fails_before_parsing(made, tmp_path, depth):
    folder = copy_of(made / "plain", tmp_path)
    text = (folder / "manifest.json").read_text()
    # json.loads itself gives up (RecursionError) somewhere below 100,000 levels: the reference
    if depth == 100000:
        with pytest.raises(RecursionError):
            json.loads("[" * depth + "]" * depth)
    (folder / "manifest.json").write_text(text.replace('"footprint": {', '"footprint": {"x": %s%s, '
                                                       % ("[" * depth, "]" * depth), 1))
    failed(box(folder, "check"), "manifest.json nests deeper than 16 levels")


def test_nesting_inside_strings_is_not_counted(made, tmp_path):
    folder = copy_of(made / "plain", tmp_path)
    text = (folder / "manifest.json").read_text()
    (folder / "manifest.json").write_text(text.replace('"footprint": {', '"footprint": {"x": "%s\\"[[", ' % ("[" * 50), 1))
    done = box(folder, "check")  # brackets inside a string are text: the manifest is still good
    assert done.returncode == 0 and "nests deeper" not in done.stderr, done.stderr


# ----------------------------------------------------------------------------- signatures
def raw_public(pem_path):
    key = serialization.load_pem_public_key(Path(pem_path).read_bytes())
    return key, key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)


def test_keygen_files(made):
    keys = made / "keys"
    assert stat.S_IMODE(os.stat(keys / "owner.key").st_mode) == 0o600
    private = serialization.load_pem_private_key((keys / "owner.key").read_bytes(), password=None)
    public, raw = raw_public(keys / "owner.pub")
    assert private.public_key().public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw) == raw
    assert main(["keygen", "-o", str(keys / "owner")]) == 2  # never overwritten


def test_signature_file_verifies_with_cryptography(made):
    fields = (made / "signed" / "manifest.sig").read_text().split()
    assert fields[:3] == ["boxwood-signature", "1", "ed25519"]
    public, _ = raw_public(made / "keys" / "owner.pub")
    public.verify(bytes.fromhex(fields[4]), (made / "signed" / "manifest.json").read_bytes())  # raises if not
    assert "manifest.sig" not in json.loads((made / "signed" / "manifest.json").read_bytes())["files"]


def test_signed_bundle_passes_with_the_trusted_key(made):
    done = box(made / "signed", "check", "--trust", str(made / "keys" / "owner.pub"))
    assert done.returncode == 0, done.stderr
    assert "signed by trusted key" in done.stdout
    done = box(made / "signed", "check")  # no trust set: passes, says it did not check
    assert done.returncode == 0 and "manifest.sig not checked" in done.stdout
    two = made / "keys" / "both.pub"
    two.write_bytes((made / "keys" / "other.pub").read_bytes() + (made / "keys" / "owner.pub").read_bytes())
    assert box(made / "signed", "check", "--trust", str(two), "--require-signature").returncode == 0


def test_swapped_model_with_a_true_manifest_fails_only_with_trust(made, tmp_path):
    """The attack the manifest alone cannot stop: another model and a manifest rewritten to match."""
    folder = copy_of(made / "signed", tmp_path)
    shutil.copy(made / "other_model" / "model.json", folder / "model.json")
    shutil.copy(made / "other_model" / "README.txt", folder / "README.txt")
    write_manifest(folder)
    assert box(folder, "check").returncode == 0  # unkeyed: the manifest is consistent again
    failed(box(folder, "check", "--trust", str(made / "keys" / "owner.pub")),
           "manifest.sig does not verify with the trusted key")


def test_unsigned_bundle_fails_when_a_signature_is_required(made):
    failed(box(made / "plain", "check", "--trust", str(made / "keys" / "owner.pub")),
           "the bundle is not signed (no manifest.sig)")
    done = box(made / "plain", "check", "--require-signature")
    assert done.returncode == 2 and "--require-signature needs a trusted key" in done.stderr


def test_wrong_key_fails(made, tmp_path):
    failed(box(made / "signed", "check", "--trust", str(made / "keys" / "other.pub")),
           "which this box does not trust")
    # an attacker re-signs a changed manifest with their own key (cryptography signs)
    folder = copy_of(made / "signed", tmp_path)
    shutil.copy(made / "other_model" / "model.json", folder / "model.json")
    shutil.copy(made / "other_model" / "README.txt", folder / "README.txt")
    write_manifest(folder)
    attacker = Ed25519PrivateKey.generate()
    sig = attacker.sign((folder / "manifest.json").read_bytes())
    (folder / "manifest.sig").write_text("boxwood-signature 1 ed25519 %s %s\n"
                                         % ((folder / "manifest.sig").read_text().split()[3], sig.hex()))
    failed(box(folder, "check", "--trust", str(made / "keys" / "owner.pub")), "does not verify")


@pytest.mark.parametrize("change", ["flip", "garbage", "short", "binary", "empty"])
def test_damaged_signature_file_fails(made, tmp_path, change):
    folder = copy_of(made / "signed", tmp_path)
    path = folder / "manifest.sig"
    text = path.read_text()
    if change == "flip":
        last = text.rstrip()[-1]
        path.write_text(text.rstrip()[:-1] + ("0" if last != "0" else "1") + "\n")
    elif change == "garbage":
        path.write_text(text.replace("ed25519", "rsa"))
    elif change == "short":
        path.write_text(text[:60])
    elif change == "binary":
        path.write_bytes(b"\xff\xfe" * 40)
    else:
        path.write_text("")
    failed(box(folder, "check", "--trust", str(made / "keys" / "owner.pub")), "manifest.sig")


def test_trust_file_inside_the_bundle_is_refused(made, tmp_path):
    folder = copy_of(made / "signed", tmp_path)
    shutil.copy(made / "keys" / "owner.pub", folder / "owner.pub")
    for given in (str(folder / "owner.pub"), "copy/owner.pub", "copy/../copy/owner.pub"):  # box() runs in folder/..
        done = box(folder, "check", "--trust", given)
        assert done.returncode == 2 and "is in the bundle folder" in done.stderr, given


def test_bad_trust_files_are_usage_errors(made, tmp_path):
    for content, reason in ((None, "not found"), (b"hello", "no '-----BEGIN PUBLIC KEY-----' block"),
                            ((made / "keys" / "owner.key").read_bytes(), "no '-----BEGIN PUBLIC KEY-----'")):
        path = tmp_path / "trust.pub"
        if path.exists():
            path.unlink()
        if content is not None:
            path.write_bytes(content)
        done = box(made / "signed", "check", "--trust", str(path))
        assert done.returncode == 2 and reason in done.stderr, done.stderr
    os.mkfifo(tmp_path / "fifo.pub")
    done = box(made / "signed", "check", "--trust", str(tmp_path / "fifo.pub"))
    assert done.returncode == 2 and "FIFO" in done.stderr


def test_sign_with_a_bad_key_is_exit_2(made, tmp_path, capsys):
    for key in (made / "keys" / "owner.pub", tmp_path / "missing.key"):
        assert main(["bundle", str(made / "a.joblib"), "-o", str(tmp_path / "x"), "--sign", str(key),
                     "--micropython-footprint", "skip"]) == 2
        assert not (tmp_path / "x").exists()
    assert "that is a public key" in capsys.readouterr().err


def test_c_bundle_is_signed_the_same_way(made, tmp_path):
    if shutil.which("gcc") is None and shutil.which("cc") is None:
        pytest.skip("no C compiler")
    out = tmp_path / "c"
    assert main(["bundle", str(made / "a.joblib"), "-o", str(out), "--target", "c", "--sign",
                 str(made / "keys" / "owner.key")]) == 0
    fields = (out / "manifest.sig").read_text().split()
    public, raw = raw_public(made / "keys" / "owner.pub")
    public.verify(bytes.fromhex(fields[4]), (out / "manifest.json").read_bytes())
    from boxwood_runtime.signature import verify
    assert verify(raw, (out / "manifest.json").read_bytes(), bytes.fromhex(fields[4]))


# ----------------------------------------------------------------------------- MicroPython
def test_signed_check_on_micropython(made, tmp_path):
    reason = mp.unavailable_reason()
    if reason:
        if os.environ.get("CI"):
            pytest.fail("MicroPython is required in CI: " + reason)
        pytest.skip(reason)

    def run(folder, *args):
        files = {"/box/" + p.name: p.read_bytes() for p in Path(folder).iterdir() if p.is_file()}
        files["/etc/boxwood/trusted.pub"] = (made / "keys" / "owner.pub").read_bytes()
        code = ("import sys\nsys.path.insert(0, '/box')\nimport box\n"
                "raise SystemExit(box.main(%r))\n" % (list(args) + ["--bundle", "/box"]))
        return mp.run(code, files)

    done = run(made / "signed", "check")  # the device's trust file: /etc/boxwood/trusted.pub
    assert done.returncode == 0, done.stderr
    assert "signed by trusted key" in done.stdout and "MicroPython" in done.stdout
    folder = copy_of(made / "signed", tmp_path)
    shutil.copy(made / "other_model" / "model.json", folder / "model.json")
    shutil.copy(made / "other_model" / "README.txt", folder / "README.txt")
    write_manifest(folder)
    done = run(folder, "check")
    assert done.returncode == 1 and "manifest.sig does not verify with the trusted key" in done.stderr
    done = run(made / "plain", "check")
    assert done.returncode == 1 and "the bundle is not signed" in done.stderr


def test_installed_box_py_uses_its_own_verifier(made, tmp_path):
    """The documented limit and its remedy: a bundle whose signature.py always says yes (and whose
    manifest matches it) fools its own box.py, but not a box.py installed outside the folder."""
    installed = tmp_path / "opt"
    installed.mkdir()
    for name in ("box.py", "signature.py"):
        shutil.copy(made / "signed" / name, installed / name)
    folder = copy_of(made / "signed", tmp_path)
    shutil.copy(made / "other_model" / "model.json", folder / "model.json")
    shutil.copy(made / "other_model" / "README.txt", folder / "README.txt")
    (folder / "signature.py").write_text((folder / "signature.py").read_text()
                                         + "\n\ndef verify(public_key, message, signature):\n    return True\n")
    write_manifest(folder)
    trust = str(made / "keys" / "owner.pub")
    fooled = box(folder, "check", "--trust", trust)
    assert fooled.returncode == 0  # the planted verifier in the bundle says yes to its own box.py
    failed(box(folder, "--bundle", str(folder), "check", "--trust", trust, script=installed / "box.py"),
           "manifest.sig does not verify with the trusted key")
    done = box(made / "signed", "--bundle", str(made / "signed"), "check", "--trust", trust,
               script=installed / "box.py")
    assert done.returncode == 0 and "signed by trusted key" in done.stdout
