"""Padding steps of recorded windows (``verify.padded_steps``), each count recomputed here with
numpy from the arrays themselves: ``Σ (T − length)`` for a lengths array, and for a padding
value the steps whose every element equals it (Keras ``Masking`` docs: a timestep is masked when
all its features equal ``mask_value``; ``Embedding(mask_zero=True)``: id 0 is masked)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import seqgate.verify.padded_steps as ps
from seqgate.errors import BadInputError
from seqgate.verify.padded_steps import add_padding_counts, count_padding
from seqgate.verify.recordings import InputSpec, load_recording

LENGTHS = {"kind": "lengths", "lengths": "lengths", "inputs": ["x"], "patterns": ["right"], "min_length": 1}
PACKED_SPECS = [InputSpec("x", np.dtype(np.float32), ("batch", "time", 2)),
                InputSpec("lengths", np.dtype(np.int64), ("batch",))]


def test_lengths_array_counts(tmp_path: Path) -> None:
    rng = np.random.default_rng(0)
    lengths = rng.integers(0, 25, size=40)
    path = tmp_path / "rec.npz"
    np.savez(path, x=rng.normal(size=(40, 24, 2)).astype(np.float32), lengths=lengths.clip(0, 24))
    rec = load_recording(path, PACKED_SPECS)
    add_padding_counts([rec], [LENGTHS])
    want = int((24 - lengths.clip(0, 24)).sum())  # numpy, from the lengths array itself
    assert rec.notes == {"padding_steps": want, "steps": 40 * 24}
    assert rec.to_json()["notes"]["padding_steps"] == want


@pytest.mark.parametrize("compressed", [False, True])
def test_mask_value_counts_every_pattern(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                         compressed: bool) -> None:
    monkeypatch.setattr(ps, "CHUNK", 3)  # several slices of windows, as for a large recording
    rng = np.random.default_rng(1)
    x = rng.normal(size=(10, 15, 3)).astype(np.float32)
    holes = rng.random((10, 15)) < 0.3
    x[holes] = -1.0  # masked steps anywhere: left, right, inside
    x[0, :4] = -1.0  # left padding
    x[1, 2, 0] = -1.0  # one feature at the mask value: not a masked step
    path = tmp_path / "rec.npz"
    (np.savez_compressed if compressed else np.savez)(path, feats=x)
    rec = load_recording(path, [InputSpec("feats", np.dtype(np.float32), ("batch", "time", 3))])
    entry = {"kind": "value", "input": "feats", "value": -1.0, "patterns": ["right", "left", "holes"]}
    want = int((x == -1.0).all(axis=2).sum())
    assert count_padding(rec, [entry]) == {"padding_steps": want, "steps": 150}


def test_token_ids_with_padding_value(tmp_path: Path) -> None:
    ids = np.random.default_rng(2).integers(0, 5, size=(7, 11)).astype(np.int64)
    path = tmp_path / "ids.npy"
    np.save(path, ids)
    rec = load_recording(path, [InputSpec("tokens", np.dtype(np.int64), ("batch", "time"))])
    entry = {"kind": "value", "input": "tokens", "value": 0}
    assert count_padding(rec, [entry]) == {"padding_steps": int((ids == 0).sum()), "steps": 77}
    assert count_padding(rec, [LENGTHS]) is None  # no lengths array: that entry does not apply


def test_length_outside_the_window_is_refused_naming_it(tmp_path: Path) -> None:
    path = tmp_path / "rec.npz"
    np.savez(path, x=np.zeros((3, 5, 2), np.float32), lengths=np.array([5, 6, 1]))
    rec = load_recording(path, PACKED_SPECS)
    with pytest.raises(BadInputError, match=r"window 1 has length 6, outside 0\.\.5"):
        add_padding_counts([rec], [LENGTHS])


def test_mask_chart_lists_only_sets_with_counts() -> None:
    from seqgate.report.mask_chart import mask_counts, mask_section

    verify = {"recordings": [{"label": "rec.npz", "notes": {"padding_steps": 3, "steps": 10}},
                             {"label": "synthetic:zeros", "notes": {"seed": 0}}]}
    assert mask_counts(verify) == [("rec.npz", 7, 3)]  # hand-worked: 10 − 3 valid steps
    section = mask_section(verify)
    assert "<td class='num'>7</td><td class='num'>3</td><td class='num'>30.0%</td>" in section
    assert mask_section({"recordings": [{"label": "synthetic:zeros"}]}) == ""  # no padded model: no chart
