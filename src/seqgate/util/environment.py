"""Where a report was made: platform, CPU, library versions (no framework is imported)."""

from __future__ import annotations

import os
import platform
from typing import Any

from seqgate import __version__
from seqgate.util.frameworks import version_of

LIBRARIES = ("numpy", "onnx", "onnxruntime", "tensorflow-cpu", "tensorflow", "keras", "torch")


def cpu_model() -> str:
    """The CPU model name from /proc/cpuinfo, else platform.processor()."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as f:
            for line in f:
                if line.lower().startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def environment() -> dict[str, Any]:
    """A JSON-ready description of this machine and the installed libraries."""
    libs = {name: v for name in LIBRARIES if (v := version_of(name))}
    affinity = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    return {
        "seqgate": __version__,
        "python": platform.python_version(),
        "platform": platform.platform(),
        "machine": platform.machine(),
        "cpu": cpu_model(),
        "logical_cores": os.cpu_count(),
        "usable_cores": affinity,
        "libraries": libs,
    }
