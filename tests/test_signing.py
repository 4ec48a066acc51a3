"""Optional Ed25519 signing of an artifact's manifest (shrinkwrap.serve.signing, the `cryptography` library):
`package --signing-key` signs; `predict`/`bench --trusted-key` refuse an unsigned artifact, a wrong key,
a changed manifest and a swapped file (exit 2, one line); the manifest's hash check tolerates manifest.sig.
And what ships names no path of the build machine."""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ec import SECP256R1, generate_private_key
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from shrinkwrap.cli import main

FAST = ["--repeats", "3", "--timed-seconds", "0", "--warmup", "0", "--warm-seconds", "0", "--sequence-length", "16", "--json"]


def _keys(folder: Path, name: str) -> tuple[Path, Path]:
    key = Ed25519PrivateKey.generate()
    private, public = folder / f"{name}.pem", folder / f"{name}.pub.pem"
    private.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                          serialization.NoEncryption()))
    public.write_bytes(key.public_key().public_bytes(serialization.Encoding.PEM,
                                                      serialization.PublicFormat.SubjectPublicKeyInfo))
    return private, public


def _run(capsys, *argv) -> tuple[int, list[str]]:
    capsys.readouterr()
    code = main([str(a) for a in argv])
    return code, capsys.readouterr().err.strip().splitlines()


@pytest.fixture
def signed(tiny_run, tmp_path, capsys):
    private, public = _keys(tmp_path, "ours")
    art = tmp_path / "art"
    code, err = _run(capsys, "package", tiny_run / "student-onnx-int8", "--out", art, "--signing-key", private)
    assert code == 0, err
    assert (art / "manifest.sig").is_file()
    return art, public


def test_signed_artifact_runs_and_every_forgery_is_refused(signed, tmp_path, capsys):
    art, public = signed
    assert _run(capsys, "predict", art, "my printer is broken", "--trusted-key", public)[0] == 0
    assert _run(capsys, "bench", art, "--trusted-key", public, *FAST)[0] == 0
    _, stranger = _keys(tmp_path, "stranger")
    code, err = _run(capsys, "predict", art, "hello", "--trusted-key", stranger)
    assert code == 2 and len(err) == 1 and "does not match" in err[0]
    # A deliberate swap: change the labels and rewrite the manifest's hash of them — the hashes alone pass.
    forged = tmp_path / "forged"
    shutil.copytree(art, forged)
    (forged / "labels.json").write_text(json.dumps(list(reversed(json.loads((forged / "labels.json").read_text())))))
    from shrinkwrap.serve.artifact import file_entries

    manifest = json.loads((forged / "manifest.json").read_text())
    manifest["files"].update(file_entries(forged, ["labels.json"]))
    (forged / "manifest.json").write_text(json.dumps(manifest, indent=2))
    assert _run(capsys, "predict", forged, "hello")[0] == 0      # untrusted: the hashes match
    for cmd in (["predict", forged, "hello"], ["bench", forged, *FAST]):
        code, err = _run(capsys, *cmd, "--trusted-key", public)
        assert code == 2 and len(err) == 1 and "does not match" in err[0], err
    (forged / "manifest.sig").write_text("not base64!!\n")
    code, err = _run(capsys, "predict", forged, "hello", "--trusted-key", public)
    assert code == 2 and "not a base64 signature" in err[0]


def test_unsigned_artifact_is_refused_with_a_trusted_key(tiny_run, tmp_path, capsys):
    _, public = _keys(tmp_path, "ours")
    for cmd in (["predict", tiny_run / "artifact", "hello"], ["bench", tiny_run / "artifact", *FAST]):
        code, err = _run(capsys, *cmd, "--trusted-key", public)
        assert code == 2 and len(err) == 1 and "unsigned artifact" in err[0], err
    code, err = _run(capsys, "bench", tiny_run / "student-onnx-int8" / "model.onnx", "--trusted-key", public, *FAST)
    assert code == 2 and "not an artifact" in err[0]


def test_bad_keys_fail_before_any_work(tiny_run, tmp_path, capsys):
    ec = generate_private_key(SECP256R1())
    (tmp_path / "ec.pem").write_bytes(ec.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                                       serialization.NoEncryption()))
    (tmp_path / "junk.pem").write_text("hello")
    for key, says in ((tmp_path / "ec.pem", "Ed25519 private key is needed"), (tmp_path / "junk.pem", "not a usable"),
                      (tmp_path / "none.pem", "no such file")):
        out = tmp_path / f"art-{key.stem}"
        code, err = _run(capsys, "package", tiny_run / "student-onnx-int8", "--out", out, "--signing-key", key)
        assert code == 2 and len(err) == 1 and says in err[0], err
        assert not out.exists()
    code, err = _run(capsys, "predict", tiny_run / "artifact", "x", "--trusted-key", tmp_path / "junk.pem")
    assert code == 2 and "not a PEM public key" in err[0]


def test_nothing_that_ships_names_a_build_machine_path(tiny_run, keyword_csv, tmp_path, capsys):
    art = tmp_path / "pkg"
    assert _run(capsys, "package", tiny_run / "student", "--out", art, "--data", keyword_csv, "--no-int8")[0] == 0
    for folder in (tiny_run / "artifact", art):
        for name in ("manifest.json", "README.md", "config.json"):
            text = (folder / name).read_text()
            for local in (str(tiny_run.parent), str(keyword_csv.parent), str(tmp_path), "/tmp/"):
                assert local not in text, (folder, name, local)
    manifest = json.loads((art / "manifest.json").read_text())
    assert manifest["data"]["path"] == keyword_csv.name and len(manifest["data"]["fingerprint"]) == 64


def test_run_signs_the_artifact_it_ships(tiny_run, tiny_run_copy, tmp_path, capsys):
    """`run --signing-key` end to end: the finished steps are reused, the artifact is rebuilt and signed, and
    predict with the matching public key accepts it."""
    private, public = _keys(tmp_path, "ours")
    code, err = _run(capsys, "run", tiny_run.parent / "recipe.yaml", "--out", tiny_run_copy, "--signing-key", private)
    assert code == 0, err
    art = tiny_run_copy / "artifact"
    assert (art / "manifest.sig").is_file()
    code, err = _run(capsys, "predict", art, "my printer is broken", "--trusted-key", public)
    assert code == 0, "\n".join(err)
    _, stranger = _keys(tmp_path, "stranger")
    assert _run(capsys, "predict", art, "hello", "--trusted-key", stranger)[0] == 2
