"""``assert`` statements on traced tensors are traced past and recorded; other data branches are not.

The modules live in ``tests/torch_assert_models.py``: pytest rewrites the ``assert`` statements
of test files, so a forward written here would not hold a plain ``assert``. Exports are
checked against PyTorch's own forward on the same inputs (an independent computation: torch's
eager kernels). Which bytecode an ``assert`` compiles to is checked on
functions compiled by CPython itself (``dis``), not on seqgate's reading of them.
"""

from __future__ import annotations

import json
import textwrap
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from torch import nn
from typer.testing import CliRunner

from seqgate.cli.app import app
from seqgate.errors import UnsupportedModelError
from seqgate.export.torch.asserts import METADATA_KEY, _outcome_at, read_skipped
from torch_assert_models import AssertBesideSizeBranch, EitherAssert, IfRaise, LengthsAssert
from torch_models import export, rand, randomize, run_onnx, torch_outputs, worst


def _skipped(model: Any) -> list[str]:
    return json.loads(next(p.value for p in model.metadata_props if p.key == METADATA_KEY))


def test_data_asserts_are_traced_past_and_recorded(rng: np.random.Generator) -> None:
    m = randomize(LengthsAssert())
    model = export(m, ["x:batch,time,3", "lengths:batch"])
    for shape in ((1, 2, 3), (4, 9, 3)):
        feeds = {"x": rand(rng, *shape), "lengths": rng.integers(1, 9, shape[0]).astype(np.float32)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
    lines = _skipped(model)
    assert len(lines) == 3, lines
    assert lines[0].startswith("torch_assert_models.py:") and "assert lengths.min() > 0" in lines[0]
    assert "assert not x.isnan().any()" in lines[1]
    assert "x.abs().max() < 1e9" in lines[2]
    assert read_skipped(model) == lines


def test_asserts_in_the_value_carrying_trace(rng: np.random.Generator) -> None:
    m = randomize(AssertBesideSizeBranch())
    model = export(m, ["x:batch,time"])
    for shape in ((1, 3), (5, 8)):
        feeds = {"x": rand(rng, *shape)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
    lines = _skipped(model)
    # the assert on the batch size holds at both sample sizes; it chooses no branch
    assert [ln.split(": ", 1)[1] for ln in lines] == [
        '`assert h.size() == (1, x.size(0), 5), "state shape"`', "`assert out.abs().max() <= 1.0`"]


def test_no_assert_no_metadata_key() -> None:
    model = export(randomize(nn.Sequential(nn.Linear(3, 2))), ["input:batch,3"])
    assert all(p.key != METADATA_KEY for p in model.metadata_props)
    assert read_skipped(model) == []


def test_assert_with_or_is_refused_as_a_data_branch() -> None:
    # `assert a or b`: its first jump skips the error on one side only, so it is not assumed
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(EitherAssert()))
    assert "x.min() > -100 or x.max() < 100" in str(e.value) and e.value.exit_code == 3


def test_if_on_data_that_raises_stays_refused() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(IfRaise()))
    assert "if x.min() < -100:" in str(e.value), str(e.value)


def _code(src: str) -> Any:
    ns: dict[str, Any] = {}
    exec(compile(textwrap.dedent(src), "<t>", "exec"), ns)
    return ns["f"].__code__


@pytest.mark.parametrize(("src", "expected"), [
    ("def f(a):\n    assert a, 'm'\n", True),
    ("def f(a):\n    assert not a\n", False),
    ("def f(a):\n    if a:\n        return 1\n", None),
    ("def f(a):\n    while a:\n        pass\n", None),
])
def test_outcome_of_the_first_conditional_jump(src: str, expected: bool | None) -> None:
    import dis

    code = _code(src)
    # CPython compiles each of these to one conditional jump on `a` (checked with dis)
    jumps = [i for i in dis.get_instructions(code) if "JUMP" in i.opname and "IF" in i.opname]
    assert _outcome_at(code, jumps[0].offset) is expected


def test_and_assert_both_jumps_keep_clear_of_the_error() -> None:
    import dis

    code = _code("def f(a, b):\n    assert a and b\n")
    jumps = [i for i in dis.get_instructions(code) if "JUMP" in i.opname and "IF" in i.opname]
    # a false `a` jumps to the error (so: a is True), then a true `b` jumps over it
    assert [_outcome_at(code, j.offset) for j in jumps] == [True, True]


def test_cli_export_prints_each_skipped_assert(tmp_path: Path) -> None:
    py = tmp_path / "net.py"
    py.write_text(textwrap.dedent('''
        import torch
        from torch import nn

        class Net(nn.Module):
            def __init__(self):
                super().__init__()
                self.gru = nn.GRU(3, 4, batch_first=True)

            def forward(self, x):
                assert x.abs().max() < 1e6, "input out of range"
                return self.gru(x)[0]

        def build():
            return Net()
    '''))
    out = tmp_path / "net.onnx"
    r = CliRunner().invoke(app, ["export", f"{py}:build", "--untrained", "-o", str(out)])
    assert r.exit_code == 0, r.output
    assert ("note: assert on traced values taken to hold (the ONNX file does not check it): "
            "net.py:11: `assert x.abs().max() < 1e6, \"input out of range\"`") in r.output, r.output
