"""The provenance an export writes into ``metadata_props`` (no absolute paths: output stays reproducible).

Keys: ``seqgate.version``; ``seqgate.source.framework``/``framework_version``/``text``; the
source file's name and sha256; the weights file's name and sha256; the custom-code file's name
and sha256 (``seqgate.source.custom_code``/``custom_code_sha256``, Keras, when one was named);
``seqgate.source.untrained = "true"`` when a PyTorch factory was exported with its own initial
parameters.
"""

from __future__ import annotations

from pathlib import Path

from seqgate import __version__
from seqgate.sources.spec import Source
from seqgate.util.files import sha256_file

UNTRAINED_KEY = "seqgate.source.untrained"


def source_metadata(src: Source, framework_version: str) -> dict[str, str]:
    """The provenance written to metadata_props (no absolute paths: output stays reproducible)."""
    meta = {
        "seqgate.version": __version__,
        "seqgate.source.framework": src.framework,
        "seqgate.source.framework_version": framework_version,
        "seqgate.source.text": portable_text(src),
    }
    if src.path is not None:
        meta["seqgate.source.file"] = src.path.name
        meta["seqgate.source.sha256"] = sha256_file(src.path)
    if src.weights is not None:
        meta["seqgate.source.weights"] = src.weights.name
        meta["seqgate.source.weights_sha256"] = sha256_file(src.weights)
    elif src.framework == "torch":
        meta[UNTRAINED_KEY] = "true"
    if src.custom_code is not None:
        meta["seqgate.source.custom_code"] = src.custom_code.name
        meta["seqgate.source.custom_code_sha256"] = sha256_file(src.custom_code)
    return meta


def portable_text(src: Source) -> str:
    """The source as typed, without directories, so exports made from any working dir match."""
    if src.framework == "torch" and src.path is not None and src.factory:
        return f"{src.path.name}:{src.factory}"
    return Path(src.text).name if src.framework == "keras" else src.text
