"""Test helpers: small PyTorch modules with non-trivial random weights, export and run helpers.

Weights are drawn from a seeded generator (never left at the initialisers): parameters
``U(−scale, scale)``, batch-norm running means ``N(0, 0.5²)`` and variances ``U(0.5, 2)`` so
normalisation does real work. torch is imported lazily by the functions that need it; the
module classes are built on first use by :func:`nn`.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

Array = np.ndarray[Any, Any]

# Issue 3 acceptance rule: |onnx − torch| <= ATOL + RTOL·|torch|, elementwise.
ATOL = 1e-4
RTOL = 1e-4


def randomize(module: Any, seed: int = 0, scale: float = 0.5) -> Any:
    """Overwrite every parameter and batch-norm statistic with seeded random values."""
    import torch

    rng = np.random.default_rng(seed)
    with torch.no_grad():
        for p in module.parameters():
            p.copy_(torch.from_numpy(rng.uniform(-scale, scale, tuple(p.shape)).astype(np.float32)))
        for name, buf in module.named_buffers():
            if name.endswith("running_var"):
                buf.copy_(torch.from_numpy(rng.uniform(0.5, 2.0, tuple(buf.shape)).astype(np.float32)))
            elif name.endswith("running_mean"):
                buf.copy_(torch.from_numpy(rng.normal(0, 0.5, tuple(buf.shape)).astype(np.float32)))
    return module.eval()


def export(module: Any, inputs: list[str] | None = None, opset: int = 17) -> Any:
    """The ONNX ModelProto of ``module`` (seqgate's PyTorch capture)."""
    from seqgate.export.torch.capture import export_torch_module

    return export_torch_module(module, opset, {"seqgate.version": "test"}, inputs=inputs)


def session(model: Any) -> Any:
    import onnxruntime as ort

    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    return ort.InferenceSession(model.SerializeToString(), opts, providers=["CPUExecutionProvider"])


def run_onnx(model: Any, feeds: dict[str, Array]) -> list[Array]:
    sess = session(model)
    names = {i.name for i in sess.get_inputs()}
    return sess.run(None, {k: v for k, v in feeds.items() if k in names})


def flatten(v: Any) -> list[Array]:
    """Outputs in the export's order: tuples and lists flattened depth first."""
    if isinstance(v, list | tuple):
        return [a for x in v for a in flatten(x)]
    if isinstance(v, dict):
        return [a for x in v.values() for a in flatten(x)]
    return [v.detach().numpy()]


def torch_outputs(module: Any, feeds: dict[str, Array]) -> list[Array]:
    import torch

    with torch.no_grad():
        return flatten(module(**{k: torch.from_numpy(v) for k, v in feeds.items()}))


def worst(ref: Sequence[Array], got: Sequence[Array], atol: float = ATOL, rtol: float = RTOL) -> float:
    """Assert ``|got − ref| <= atol + rtol·|ref|`` for every pair; return the largest |Δ|."""
    assert len(ref) == len(got), f"{len(ref)} reference outputs, {len(got)} computed"
    w = 0.0
    for i, (r, g) in enumerate(zip(ref, got, strict=True)):
        r = np.asarray(r)
        g = np.asarray(g)
        assert r.shape == g.shape, f"output {i}: shape {g.shape}, expected {r.shape}"
        if r.dtype.kind in "iub":
            np.testing.assert_array_equal(g, r)
            continue
        diff = np.abs(g.astype(np.float64) - r.astype(np.float64))
        bound = atol + rtol * np.abs(r.astype(np.float64))
        assert np.all(diff <= bound), f"output {i}: max |Δ| {diff.max():.3g} exceeds the tolerance"
        w = max(w, float(diff.max()) if diff.size else 0.0)
    return w


def check(module: Any, feeds: dict[str, Array], inputs: list[str] | None = None, opset: int = 17) -> float:
    """Export ``module``, run torch and onnxruntime on ``feeds``, assert agreement; worst |Δ|."""
    model = export(module, inputs, opset)
    return worst(torch_outputs(module, feeds), run_onnx(model, feeds))


def rand(rng: np.random.Generator, *shape: int) -> Array:
    return rng.normal(0, 1, shape).astype(np.float32)


_CLASSES: dict[str, Any] = {}


def nn() -> Any:
    """The module classes below, defined once torch is imported."""
    if not _CLASSES:
        _define()
    return type("Models", (), dict(_CLASSES))


def _define() -> None:
    import torch
    from torch import nn as tnn

    class Recurrent(tnn.Module):
        """One recurrent module; forward returns everything it returns."""

        def __init__(self, kind: str, input_size: int = 5, hidden: int = 7, **kw: Any) -> None:
            super().__init__()
            cls = {"lstm": tnn.LSTM, "gru": tnn.GRU, "rnn": tnn.RNN}[kind]
            self.rnn = cls(input_size, hidden, **kw)

        def forward(self, x: Any) -> Any:
            return self.rnn(x)

    class RecurrentWithState(Recurrent):
        """States passed in: forward(x, h0) or forward(x, h0, c0)."""

        def forward(self, x: Any, h0: Any, c0: Any = None) -> Any:  # type: ignore[override]
            if isinstance(self.rnn, tnn.LSTM):
                return self.rnn(x, (h0, c0))
            return self.rnn(x, h0)

    class Classifier(tnn.Module):
        """Embedding → bidirectional GRU → last step → Linear → softmax."""

        def __init__(self) -> None:
            super().__init__()
            self.emb = tnn.Embedding(20, 6)
            self.gru = tnn.GRU(6, 5, batch_first=True, bidirectional=True)
            self.head = tnn.Sequential(tnn.Dropout(0.3), tnn.Linear(10, 4))

        def forward(self, tokens: Any) -> Any:
            out, _ = self.gru(self.emb(tokens))
            return torch.softmax(self.head(out[:, -1, :]), dim=-1)

    class Encoder(tnn.Module):
        """Nested submodules: conv front end, stacked LSTM, norm and head."""

        def __init__(self) -> None:
            super().__init__()
            self.front = tnn.Sequential(tnn.Conv1d(4, 6, 3, padding=1), tnn.ReLU())
            self.body = tnn.ModuleDict({"rnn": tnn.LSTM(6, 8, num_layers=2, batch_first=True, dropout=0.2)})
            self.norm = tnn.LayerNorm(8)
            self.out = tnn.Linear(8, 2)

        def forward(self, x: Any) -> Any:
            y = self.front(x.transpose(1, 2)).transpose(1, 2)
            seq, (h, _c) = self.body["rnn"](y)
            return self.out(self.norm(seq)), h[-1]

    _CLASSES.update(Recurrent=Recurrent, RecurrentWithState=RecurrentWithState,
                    Classifier=Classifier, Encoder=Encoder)


FACTORY_FILE = '''
import torch
from torch import nn


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.rnn = nn.GRU(4, 6, num_layers=2, batch_first=True)
        self.fc = nn.Linear(6, 3)

    def forward(self, x):
        out, h = self.rnn(x)
        return self.fc(out[:, -1])


def build():
    torch.manual_seed(0)
    return Net()
'''


def linear_then(fn: Any) -> Any:
    """A module: ``Linear(6, 6)`` front end (fixes the feature size), then ``fn`` of its output,
    traced as part of forward — the harness for one function or indexing case."""
    from torch import nn

    class LinearThen(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.fn = fn
            self.lin = nn.Linear(6, 6)

        def forward(self, x: Any) -> Any:
            return self.fn(self.lin(x))

    return LinearThen()


def check_linear_then(fn: Any, rng: np.random.Generator) -> Any:
    """Export ``linear_then(fn)`` (seeded weights, ``x:batch,time,6``) and compare it with PyTorch at
    batch 1 × 4 steps and 3 × 9 steps; the ONNX model."""
    m = randomize(linear_then(fn), seed=1)
    model = export(m, inputs=["x:batch,time,6"])
    for n, t in ((1, 4), (3, 9)):
        feeds = {"x": rand(rng, n, t, 6)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
    return model


def cli_export_verify(tmp_path: Any, factory_source: str) -> set[str]:
    """Write ``factory_source`` (a module file whose ``make()`` builds the model) to ``net.py``,
    save ``make()``'s weights, run ``seqgate export`` and ``seqgate verify --synthetic`` on them
    through the CLI (each must exit 0), and return the names of the tensors verify compared."""
    import json
    import textwrap

    import torch
    from typer.testing import CliRunner

    from seqgate.cli.app import app

    py, weights = tmp_path / "net.py", tmp_path / "w.pt"
    py.write_text(textwrap.dedent(factory_source))
    ns: dict[str, Any] = {}
    exec(compile(py.read_text(), str(py), "exec"), ns)
    torch.save(ns["make"]().state_dict(), weights)
    runner = CliRunner()
    out, rep = tmp_path / "n.onnx", tmp_path / "r.json"
    r = runner.invoke(app, ["export", f"{py}:make", "--weights", str(weights), "-o", str(out)])
    assert r.exit_code == 0, r.output
    r = runner.invoke(app, ["verify", str(out), "--source", f"{py}:make", "--weights", str(weights),
                            "--synthetic", "--quiet", "--report", str(rep)])
    assert r.exit_code == 0, r.output
    return {t["name"] for t in json.loads(rep.read_text())["tensors"]}


def op_types(graph: Any) -> list[str]:
    """Op types of ``graph`` and of every sub-graph in it (If branches, Scan bodies)."""
    out = []
    for n in graph.node:
        out.append(n.op_type)
        for a in n.attribute:
            if a.type == a.GRAPH:
                out.extend(op_types(a.g))
    return out
