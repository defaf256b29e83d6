"""Export a model source to an ONNX file: ``export_source`` is the whole job of ``seqgate export``.

Opset: the default is 17, the first opset with a native LayerNormalization, so every op seqgate
emits is native and the file also runs on onnxruntime releases from 1.14 on (edge devices
often lag). The accepted range is ``MIN_OPSET..MAX_OPSET``; every value in it is exported and
run under onnxruntime 1.32 by the tests.

Provenance: the file records what it was made from (:func:`source_metadata`): the source file's
name and sha256, the weights file's name and sha256, a Keras source's custom-code file's name and
sha256, and ``seqgate.source.untrained = "true"``
when a PyTorch factory was exported with its own initial parameters. That last case is refused
unless asked for with ``untrained=True`` (``--untrained``): a factory alone builds an untrained
model, and a release exported by mistake without its weights would otherwise pass unnoticed.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from seqgate.errors import BadInputError
from seqgate.export.metadata import source_metadata
from seqgate.sources.keras import load_keras
from seqgate.sources.spec import Source, parse_source
from seqgate.util.files import check_writable, write_atomic

DEFAULT_OPSET = 17
MIN_OPSET = 17
MAX_OPSET = 28  # highest onnx 1.23 knows; every opset in range runs on onnxruntime 1.32 (tests/test_opsets.py)


@dataclass(frozen=True)
class ExportResult:
    """What ``export_source`` wrote."""

    path: Path
    model: Any  # onnx.ModelProto
    source: Source
    probes: int
    opset: int


def check_opset(opset: int) -> int:
    if not MIN_OPSET <= opset <= MAX_OPSET:
        raise BadInputError(
            f"--opset {opset} is outside the supported range {MIN_OPSET}..{MAX_OPSET} "
            f"(below {MIN_OPSET} LayerNormalization is not native; above {MAX_OPSET} is not "
            f"checked against onnxruntime). Pick a value in that range; default {DEFAULT_OPSET}."
        )
    return opset


def check_weights_choice(src: Source, untrained: bool) -> None:
    """A PyTorch factory needs a weights file, or ``untrained`` to say it is meant to go without."""
    if src.framework != "torch":
        if untrained:
            raise BadInputError(f"--untrained is for PyTorch factory sources; {src.text} is a Keras file, "
                                f"which holds its trained weights. Drop --untrained.")
        return
    if untrained and src.weights is not None:
        raise BadInputError(f"--untrained and --weights {src.weights} contradict each other: --untrained "
                            f"exports the factory's own initial parameters. Drop one of them.")
    if not untrained and src.weights is None:
        raise BadInputError(
            f"no weights for {src.text}: a factory alone builds the model with its initial (untrained) "
            f"parameters. Pass the trained state dict with --weights FILE.pt (saved with "
            f"torch.save(model.state_dict(), 'FILE.pt'); in a gate config, [model] weights = \"FILE.pt\"). "
            f"If the model is meant to be untrained (a test or placeholder), pass --untrained "
            f"([model] untrained = true); the file and every report then say so."
        )


def has_stateful_layer(model: Any) -> bool:
    """A recurrent layer of the source was ``stateful=True`` (recorded in its probes' source)."""
    from seqgate.onnxfile.probes import read_probe_map

    return any(p.source.get("stateful") for p in read_probe_map(model))


def build_onnx(src: Source, opset: int = DEFAULT_OPSET, **options: Any) -> Any:
    """Load ``src`` and return its ONNX ModelProto (nothing is written)."""
    check_opset(opset)
    if src.framework == "keras":
        from seqgate.export.keras.walk import export_keras_model
        from seqgate.util.frameworks import version_of

        assert src.path is not None
        model = load_keras(src.path, src.custom_code)
        return export_keras_model(model, opset, source_metadata(src, version_of("keras")))
    from seqgate.export.torch.capture import export_torch_source  # type: ignore[import-not-found]

    return export_torch_source(src, opset, **options)


def export_source(
    source: str | Source,
    out: str | Path,
    opset: int = DEFAULT_OPSET,
    force: bool = False,
    weights: str | None = None,
    untrained: bool = False,
    streaming: bool | None = None,
    custom_code: str | Path | None = None,
    **options: Any,
) -> ExportResult:
    """Export ``source`` to ``out`` atomically; refuse to overwrite unless ``force``.

    A PyTorch factory without ``weights`` is refused unless ``untrained`` (module docstring).
    ``custom_code``: a Keras source's file of custom classes (run first, hashed in the provenance);
    a :class:`Source` carries its own.
    """
    from seqgate.onnxfile.probes import read_probe_map

    src = source if isinstance(source, Source) else parse_source(source, weights, custom_code)
    check_weights_choice(src, untrained)
    out_path = Path(out)
    check_writable(out_path, force)
    check_opset(opset)
    model = build_onnx(src, opset, **options)
    if streaming or (streaming is None and has_stateful_layer(model)):
        from seqgate.export.streaming import make_streaming

        by_default = "" if streaming else (" (its stateful=True layers make streaming the default; "
                                           "--no-streaming writes an ordinary file whose every call starts "
                                           "from zero states)")
        model = make_streaming(model, src.text, by_default)
    data = model.SerializeToString(deterministic=True)
    write_atomic(out_path, data)
    return ExportResult(out_path, model, src, len(read_probe_map(model)), opset)
