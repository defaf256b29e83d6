"""``--input PARAM.KEY:DIMS``: a forward() taking a dict or a dataclass of tensors.

Each export is compared with the module called directly on a dict / dataclass built here from
the same NumPy arrays (two independent computations: ONNX Runtime and PyTorch); the runner
verify uses is checked the same way, and every misuse is a one-paragraph exit 2.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pytest
import torch
from torch import nn

from seqgate.errors import BadInputError, UnsupportedModelError
from seqgate.onnxfile.input_meta import read_structure
from seqgate.runtimes.torch import TorchRunner
from torch_models import export, flatten, rand, randomize, run_onnx, worst

torch.set_num_threads(1)


class DictForecaster(nn.Module):
    """A forward reading named tensors of one dict, with one optional key."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 5, batch_first=True)
        self.head = nn.Linear(5, 2)

    def forward(self, x: dict[str, torch.Tensor]) -> dict[str, torch.Tensor]:
        y, (h, _) = self.lstm(x["encoder_cont"])
        out = self.head(y[:, -1])
        scale = x.get("target_scale")
        if scale is not None:
            out = out * scale
        if "target_shift" in x:
            out = out + x["target_shift"]
        return {"prediction": out, "state": h}


@dataclass
class Window:
    values: torch.Tensor
    scale: torch.Tensor
    offset: torch.Tensor | None = None
    name: str = "window"


class DataclassNet(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(3, 4, batch_first=True)

    def forward(self, w: Window, bias: torch.Tensor) -> torch.Tensor:
        y = self.gru(w.values)[0] * w.scale.unsqueeze(1)
        if w.offset is not None:
            y = y + w.offset.unsqueeze(1)
        return y + bias


def _torch(m: nn.Module, *args: Any) -> list[np.ndarray[Any, Any]]:
    with torch.no_grad():
        return flatten(m(*args))


def _t(a: np.ndarray[Any, Any]) -> torch.Tensor:
    return torch.from_numpy(a)


def test_dict_forward_exports_under_dotted_names(rng: np.random.Generator) -> None:
    m = randomize(DictForecaster())
    model = export(m, ["x.encoder_cont:batch,time,3", "x.target_scale:batch,2"])
    assert [i.name for i in model.graph.input] == ["x.encoder_cont", "x.target_scale"]
    assert [o.name for o in model.graph.output] == ["prediction", "state"]
    assert read_structure(model) == {"x": {"kind": "dict", "keys": {
        "encoder_cont": "x.encoder_cont", "target_scale": "x.target_scale"}}}
    enc, scale = rand(rng, 4, 9, 3), rand(rng, 4, 2)
    ref = _torch(m, {"encoder_cont": _t(enc), "target_scale": _t(scale)})
    worst(ref, run_onnx(model, {"x.encoder_cont": enc, "x.target_scale": scale}))


def test_optional_keys_follow_what_was_declared(rng: np.random.Generator) -> None:
    m = randomize(DictForecaster())
    model = export(m, ["x.encoder_cont:batch,time,3", "x.target_shift:batch,2"])
    enc, shift = rand(rng, 3, 6, 3), rand(rng, 3, 2)
    ref = _torch(m, {"encoder_cont": _t(enc), "target_shift": _t(shift)})
    worst(ref, run_onnx(model, {"x.encoder_cont": enc, "x.target_shift": shift}))


def test_dataclass_forward_is_built_from_keyword_tensors(rng: np.random.Generator) -> None:
    m = randomize(DataclassNet())
    model = export(m, ["w.values:batch,time,3", "w.scale:batch,4", "w.offset:batch,4", "bias:4"])
    assert [i.name for i in model.graph.input] == ["w.values", "w.scale", "w.offset", "bias"]
    entry = read_structure(model)["w"]
    assert entry["kind"] == "dataclass" and entry["class"].endswith("Window")
    vals, scale, off, bias = rand(rng, 2, 7, 3), rand(rng, 2, 4), rand(rng, 2, 4), rand(rng, 4)
    ref = _torch(m, Window(values=_t(vals), scale=_t(scale), offset=_t(off)), _t(bias))
    worst(ref, run_onnx(model, {"w.values": vals, "w.scale": scale, "w.offset": off, "bias": bias}))


def test_dataclass_fields_with_defaults_may_be_left_out(rng: np.random.Generator) -> None:
    m = randomize(DataclassNet())
    model = export(m, ["w.values:batch,time,3", "w.scale:batch,4", "bias:4"])
    vals, scale, bias = rand(rng, 2, 5, 3), rand(rng, 2, 4), rand(rng, 4)
    ref = _torch(m, Window(values=_t(vals), scale=_t(scale)), _t(bias))
    worst(ref, run_onnx(model, {"w.values": vals, "w.scale": scale, "bias": bias}))


@pytest.mark.parametrize(("module", "specs"), [
    (DictForecaster, ["x.encoder_cont:batch,time,3", "x.target_scale:batch,2"]),
    (DataclassNet, ["w.values:batch,time,3", "w.scale:batch,4", "bias:4"]),
])
def test_runner_rebuilds_the_structure(module: type, specs: list[str], rng: np.random.Generator) -> None:
    m = randomize(module())
    model = export(m, specs)
    feeds = {i.name: rand(rng, *[3 if d.dim_param == "batch" else 6 if d.dim_param == "time" else d.dim_value
                                 for d in i.type.tensor_type.shape.dim]) for i in model.graph.input}
    runner = TorchRunner(m, [], [o.name for o in model.graph.output], structure=read_structure(model))
    got = runner.run(feeds)
    worst(run_onnx(model, feeds), [got[o.name] for o in model.graph.output])


def test_reading_an_undeclared_key_names_the_option() -> None:
    with pytest.raises(BadInputError) as e:
        export(randomize(DictForecaster()), ["x.target_scale:batch,2"])
    msg = str(e.value)
    assert e.value.exit_code == 2 and "x['encoder_cont']" in msg and "--input x.encoder_cont:" in msg, msg


@pytest.mark.parametrize(("specs", "needle"), [
    (["w.values:batch,time,3", "bias:4"], "needs field(s) scale that no --input names"),
    (["w.values:batch,time,3", "w.scale:batch,4", "w.weight:batch,4", "bias:4"], "has no field(s) weight"),
    (["v.values:batch,time,3", "bias:4"], "has no parameter 'v'"),
    (["bias.a:4", "w.values:batch,time,3", "w.scale:batch,4"], "is annotated `Tensor`"),
])
def test_structures_that_cannot_be_built_are_exit_2(specs: list[str], needle: str) -> None:
    with pytest.raises(BadInputError) as e:
        export(randomize(DataclassNet()), specs)
    msg = str(e.value)
    assert e.value.exit_code == 2 and needle in msg and "\n" not in msg, msg


class Unannotated(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(3, 4, batch_first=True)

    def forward(self, batch):  # unannotated, as in many projects: the keys are seen after tracing
        return self.gru(batch["encoder_cont"])[0] * batch["scale"]


@pytest.mark.parametrize(("module", "option"), [
    (DictForecaster, "--input x.KEY:DIM,DIM,... for each KEY the forward reads"),
    (Unannotated, "--input batch.encoder_cont:DIM,DIM,... --input batch.scale:DIM,DIM,..."),
])
def test_refusal_without_the_option_names_it(module: type, option: str) -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(module()))
    assert option in str(e.value), str(e.value)


def test_unannotated_parameter_is_a_dict(rng: np.random.Generator) -> None:
    m = randomize(Unannotated())
    model = export(m, ["batch.encoder_cont:batch,time,3", "batch.scale:batch,1,4"])
    enc, scale = rand(rng, 2, 5, 3), rand(rng, 2, 1, 4)
    ref = _torch(m, {"encoder_cont": _t(enc), "scale": _t(scale)})
    worst(ref, run_onnx(model, {"batch.encoder_cont": enc, "batch.scale": scale}))


class CellLoop(nn.Module):
    """A dict parameter read by a cell loop (loop capture)."""

    def __init__(self) -> None:
        super().__init__()
        self.cell = nn.LSTMCell(3, 5)

    def forward(self, batch: dict) -> torch.Tensor:
        x = batch["past"]
        h = torch.zeros(x.size(0), 5)
        c = torch.zeros(x.size(0), 5)
        outs = []
        for t in range(x.size(1)):
            h, c = self.cell(x[:, t], (h, c))
            outs.append(h)
        return torch.stack(outs, 1) * batch["weight"].unsqueeze(1)


def test_cell_loop_over_a_dict_tensor_keeps_its_probes(rng: np.random.Generator) -> None:
    from seqgate.onnxfile.probes import read_probe_map

    m = randomize(CellLoop())
    model = export(m, ["batch.past:batch,time,3", "batch.weight:batch,5"])
    assert [n.op_type for n in model.graph.node].count("LSTM") == 1  # the loop folded into one node
    past, weight = rand(rng, 2, 6, 3), rand(rng, 2, 5)
    feeds = {"batch.past": past, "batch.weight": weight}
    worst(_torch(m, {"past": _t(past), "weight": _t(weight)}), run_onnx(model, feeds))
    probes = read_probe_map(model)
    assert probes and all(p.layer.startswith("cell") for p in probes)
    # the probe map names the user's own module (the twin shares its submodules), so the runner
    # that verify uses finds and records them on the original module
    runner = TorchRunner(m, probes, [o.name for o in model.graph.output], structure=read_structure(model))
    got = runner.run(feeds)
    assert all(p.name in got for p in probes)


class WithInitialState(nn.Module):
    """A dict parameter followed by a defaulted tensor parameter (fx's own trace)."""

    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(3, 5, batch_first=True)

    def forward(self, batch: dict, h0: torch.Tensor | None = None) -> torch.Tensor:
        return self.gru(batch["past"], h0)[0] + batch["level"].unsqueeze(1)


@pytest.mark.parametrize("with_h0", [False, True])
def test_defaulted_parameter_after_a_dict(with_h0: bool, rng: np.random.Generator) -> None:
    m = randomize(WithInitialState())
    specs = ["batch.past:batch,time,3", "batch.level:batch,5"] + (["h0:1,batch,5"] if with_h0 else [])
    model = export(m, specs)
    past, level, h0 = rand(rng, 3, 4, 3), rand(rng, 3, 5), rand(rng, 1, 3, 5)
    feeds = {"batch.past": past, "batch.level": level, **({"h0": h0} if with_h0 else {})}
    assert [i.name for i in model.graph.input] == list(feeds)
    ref = _torch(m, {"past": _t(past), "level": _t(level)}, _t(h0) if with_h0 else None)
    worst(ref, run_onnx(model, feeds))
