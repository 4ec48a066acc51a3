"""shrinkwrap: shrink a fine-tuned BERT-family text classifier for CPU serving, measuring every step.

From Python, with the plain install (no torch): `shrinkwrap.load_artifact(path)` checks an artifact's files
against its manifest (and its signature with `trusted_key`) and returns it loaded; its `predict(texts)` gives
one dict per text with the fields `shrinkwrap predict` prints.
"""

__version__ = "0.1.0"


def load_artifact(path, trusted_key=None, threads: int = 0):
    """The artifact at `path`, every file checked against manifest.json first (and manifest.sig against
    `trusted_key`, an Ed25519 public key PEM file, when given); a modified or incomplete one raises
    shrinkwrap.serve.errors.UserError naming the file. threads = 0 lets ONNX Runtime choose.

        art = shrinkwrap.load_artifact("runs/demo/artifact")
        art.predict(["my router is offline"])   # [{"text": ..., "label": ..., "scores": {...}}]
    """
    from pathlib import Path

    from shrinkwrap.serve.artifact import load

    if trusted_key is not None:
        from shrinkwrap.serve.signing import check_signature

        check_signature(Path(path), Path(trusted_key))
    return load(path, threads)
