"""verify on padded models: padded synthetic sets are generated from the model's masking, every
step is compared (padded ones too, their values are defined by the masking rules), and each set
reports how many steps were padding.

The references are the source frameworks themselves (Keras with its mask, PyTorch with packed
sequences); expected padding counts are hand-counted from the set's own arrays.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

from seqgate.verify.run import verify_model

NET = '''
import torch
from torch import nn
from torch.nn.utils.rnn import pack_padded_sequence, pad_packed_sequence


class Forecaster(nn.Module):
    def __init__(self):
        super().__init__()
        self.gru = nn.GRU(3, 5, num_layers=2, batch_first=True)
        self.head = nn.Linear(5, 1)

    def forward(self, x, lengths):
        packed = pack_padded_sequence(x, lengths, batch_first=True, enforce_sorted=False)
        out, h = self.gru(packed)
        y, _ = pad_packed_sequence(out, batch_first=True, total_length=x.size(1))
        return self.head(y), h


def make():
    torch.manual_seed(5)
    return Forecaster()
'''


def _sets(rep: Any) -> dict[str, dict[str, Any]]:
    return {r["label"]: r for r in rep.recordings}


def test_keras_masked_model_verifies_on_padded_sets(tmp_path: Path) -> None:
    import keras_models as km
    from seqgate.export.run import export_source

    k = km.keras()
    rng = np.random.default_rng(2)

    def body(x: Any) -> Any:
        e = k.layers.Embedding(9, 4, mask_zero=True)(x)
        h = k.layers.Bidirectional(k.layers.LSTM(3, return_sequences=True))(e)
        return k.layers.GRU(3)(h)

    model = km.functional((None,), body, rng, dtypes=["int32"], name="tokens")
    km.save(model, tmp_path / "m.keras")
    export_source(tmp_path / "m.keras", tmp_path / "m.onnx")
    rep = verify_model(tmp_path / "m.onnx", str(tmp_path / "m.keras"), synthetic=True, batch_size=8)
    assert rep.passed, rep.headline()
    sets = _sets(rep)
    for kind in ("random_lengths", "left", "holes", "all", "length_1"):
        assert f"synthetic:padded_{kind}" in sets, sorted(sets)
    notes = sets["synthetic:padded_all"]["notes"]
    assert notes["padding_steps"] == notes["steps"] > 0  # every step padded (by construction)
    one = sets["synthetic:padded_length_1"]["notes"]
    assert one["steps"] - one["padding_steps"] == sets["synthetic:padded_length_1"]["windows"]


def test_packed_torch_model_verifies_without_length_zero(tmp_path: Path) -> None:
    torch = pytest.importorskip("torch")
    import importlib.util

    from seqgate.export.run import export_source

    (tmp_path / "net.py").write_text(NET)
    spec = importlib.util.spec_from_file_location("seqgate_test_packed", tmp_path / "net.py")
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    torch.save(mod.make().state_dict(), tmp_path / "w.pt")
    source = f"{tmp_path / 'net.py'}:make"
    export_source(source, tmp_path / "n.onnx", weights=str(tmp_path / "w.pt"))
    lengths = np.array([8, 3, 1, 5], np.int64)
    np.savez(tmp_path / "rec.npz", x=np.random.default_rng(1).normal(size=(4, 8, 3)).astype(np.float32),
             lengths=lengths)
    rep = verify_model(tmp_path / "n.onnx", source, weights=str(tmp_path / "w.pt"),
                       recordings=[tmp_path / "rec.npz"], synthetic=True, batch_size=4)
    assert rep.passed, rep.headline()
    sets = _sets(rep)
    assert "synthetic:padded_random_lengths" in sets and "synthetic:padded_length_1" in sets
    # PyTorch refuses length 0 and packing only means right padding: no such sets
    assert not {"synthetic:padded_all", "synthetic:padded_left", "synthetic:padded_holes"} & set(sets)
    names = [t["name"] for t in rep.tensors]
    assert any(n.endswith("hidden_final") for n in names)
