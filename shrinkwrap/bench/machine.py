"""What a measurement ran on: recorded beside every figure, since latency means nothing without it."""
from __future__ import annotations

import os
import platform
from importlib import metadata

PACKAGES = ("torch", "transformers", "tokenizers", "onnx", "onnxruntime", "optimum", "optimum-onnx", "numpy",
            "uvicorn")


def cpu_model() -> str:
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as f:
            for line in f:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def library_versions() -> dict[str, str]:
    out = {"python": platform.python_version()}
    for name in PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            pass
    return out


def describe() -> dict:
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    return {"cpu": cpu_model(), "cores_available": cores, "cores_total": os.cpu_count(),
            "platform": platform.platform(), "versions": library_versions()}
