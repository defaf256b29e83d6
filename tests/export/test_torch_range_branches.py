"""Python branches on integer input data decided by the declared value ranges (``--input ...=LOW..HIGH``).

The modules live in ``tests/torch_range_models.py`` (plain ``assert`` statements: pytest rewrites
those of test files). Every export is checked against the source framework's own forward
(PyTorch eager on the same inputs, an independent computation), on inputs inside the declared
range; the refusals are pinned by the line they name.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from seqgate.cli.app import app
from seqgate.errors import UnsupportedModelError
from seqgate.export.torch.branches import RANGED_KEY, read_ranged
from torch_models import export, rand, randomize, run_onnx, torch_outputs, worst
from torch_range_models import (
    RANGE_GUARDED_NET_SOURCE,
    CombinedConditions,
    FullOfSize,
    LengthsGuardedLSTM,
    MeanBranch,
)

LENGTHS = ["x:batch,time,3", "lengths:batch:int64=1..time"]


def _lengths(rng: np.random.Generator, batch: int, time: int) -> np.ndarray:
    out = rng.integers(1, time + 1, batch).astype(np.int64)
    out[0] = time  # a full row beside shorter ones
    return out


def test_library_pattern_exports_and_matches_pytorch(rng: np.random.Generator) -> None:
    m = randomize(LengthsGuardedLSTM())
    model = export(m, LENGTHS)
    assert any(n.op_type == "LSTM" for n in model.graph.node)
    for batch, time in ((1, 1), (3, 6), (5, 11)):
        feeds = {"x": rand(rng, batch, time, 3), "lengths": _lengths(rng, batch, time)}
        # reference: the source framework's own forward (PyTorch eager, pack_padded_sequence path)
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
    entries = read_ranged(model)
    assert [e["where"].split(": ", 1)[1] for e in entries] == ["`if max_length == 0:`", "`if min_length == 0:`"]
    assert all(e["outcome"] is False and e["ranges"] == {"lengths": "1..time"} for e in entries)
    assert entries[0]["where"].startswith("torch_range_models.py:")


def test_lengths_built_from_a_size(rng: np.random.Generator) -> None:
    m = randomize(FullOfSize())
    model = export(m, ["x:batch,time,3"])
    for batch, time in ((1, 2), (4, 9)):
        feeds = {"x": rand(rng, batch, time, 3)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))  # reference: PyTorch eager forward
    (entry,) = read_ranged(model)
    # no declared range: the fill is x.size(1), a dynamic dim, so at least 1
    assert entry["outcome"] is False and entry["ranges"] == {} and "time" in entry["dims"]


def test_clamp_shift_cast_and_all(rng: np.random.Generator) -> None:
    m = randomize(CombinedConditions())
    model = export(m, LENGTHS)
    for batch, time in ((2, 3), (3, 7)):
        feeds = {"x": rand(rng, batch, time, 3), "lengths": _lengths(rng, batch, time)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))  # reference: PyTorch eager forward
    assert [e["outcome"] for e in read_ranged(model)] == [True, False]


@pytest.mark.parametrize("declared", ["lengths:batch:int64", "lengths:batch:int64=0..time"])
def test_no_range_or_a_range_holding_zero_is_refused(declared: str) -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(LengthsGuardedLSTM()), ["x:batch,time,3", declared])
    text = str(e.value)
    assert e.value.exit_code == 3
    assert "`if max_length == 0:`" in text and "decides on tensor data" in text, text
    if "=" in declared:
        assert "the declared value ranges (lengths in 0..time) do not decide it" in text, text
    else:
        assert "--input lengths:batch:int64=LOW..HIGH" in text, text


def test_a_branch_through_an_op_without_a_rule_is_refused() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(MeanBranch()), LENGTHS)
    assert "`if lengths.float().mean() < 0.5:`" in str(e.value) and e.value.exit_code == 3


def test_no_range_decided_branch_no_metadata_key() -> None:
    from torch import nn

    model = export(randomize(nn.Sequential(nn.Linear(3, 2))), ["input:batch,3"])
    assert all(p.key != RANGED_KEY for p in model.metadata_props) and read_ranged(model) == []


def test_cli_export_prints_each_range_decided_branch(tmp_path: Path) -> None:
    py = tmp_path / "net.py"
    py.write_text(RANGE_GUARDED_NET_SOURCE)
    out = tmp_path / "net.onnx"
    r = CliRunner().invoke(app, ["export", f"{py}:build", "--untrained", "-o", str(out), "--input",
                                 "x:batch,time,3", "--input", "lengths:batch:int64=1..time"])
    assert r.exit_code == 0, r.output
    assert ("note: branch decided by the declared value ranges (lengths in 1..time: the value it tests "
            "is False for every input in them; the ONNX file is right only inside them): "
            "net.py:11: `if lengths.max() <= 0:`") in r.output, r.output
