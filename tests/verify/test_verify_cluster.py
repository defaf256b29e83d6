"""verify sharded on Ray: ranges, merging, a real local Ray cluster, a worker killed mid-run.

The merged report must equal a single-process run on the same windows: the single-process run
is the independent computation here (a plain loop over every batch in one process), and the
counts, maxima and outside-tolerance counts are also checked against NumPy's own ``isclose``
(numpy's rule ``|a − b| ≤ atol + rtol·|b|``) on split data. The Ray tests start a real Ray on
127.0.0.1 inside the test and stop it at the end; they are marked ``ray`` and skipped when
the ``cluster`` extra is not installed.
"""

from __future__ import annotations

import os
import re
import signal
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from seqgate.errors import BadInputError
from seqgate.settings.values import parse_cluster, parse_workers
from seqgate.verify.cluster import loopback_environment, plan_ranges
from seqgate.verify.compare import TensorStats, merge_shards


# ----- no Ray needed -----------------------------------------------------------------------------------
@pytest.mark.parametrize(("windows", "batch", "workers"), [([512], 64, 2), ([7, 0, 130], 8, 3), ([1], 64, 4),
                                                           ([1000, 33], 16, 1)])
def test_ranges_cover_every_window_once_in_whole_batches(windows: list[int], batch: int, workers: int) -> None:
    ranges = plan_ranges(windows, batch, workers)
    for s, n in enumerate(windows):
        covered = np.zeros(n, np.int64)
        for r in ranges:
            if r.set_index == s:
                covered[r.lo:r.hi] += 1
                assert r.lo % batch == 0  # batches line up with a single-process run's
        assert (covered == 1).all()
    assert [r.index for r in ranges] == list(range(len(ranges)))


def test_merged_ranges_equal_one_pass_and_numpy(rng: np.random.Generator) -> None:
    b = rng.normal(size=(40, 6, 1, 5)).astype(np.float32)
    a = b + rng.normal(scale=3e-5, size=b.shape).astype(np.float32)
    a[13, 2, 0, 1] += 5e-3  # one element far outside, in the second range
    one = TensorStats(1e-4, 1e-4, time_indexed=True)
    parts = []
    for lo in range(0, 40, 8):
        one.update(a[lo:lo + 8], b[lo:lo + 8], lo)
    for lo, hi in ((0, 16), (16, 32), (32, 40)):
        p = TensorStats(1e-4, 1e-4, time_indexed=True)
        for s in range(lo, hi, 8):
            p.update(a[s:s + 8], b[s:s + 8], s)
        parts.append(p)
    merged = merge_shards(parts)
    m1, m2 = one.metrics(), merged.metrics()
    for k in ("elements", "windows", "max_abs", "max_rel", "p99_abs", "outside", "worst", "first_bad_step"):
        assert m1[k] == m2[k], k
    assert merged.per_step_max_abs() == one.per_step_max_abs()
    assert m2["mean_abs"] == pytest.approx(m1["mean_abs"], rel=1e-6)
    # numpy: isclose(a, b, atol, rtol) is |a − b| ≤ atol + rtol·|b| (numpy docs)
    a64, b64 = a.astype(np.float64), b.astype(np.float64)
    assert m2["outside"] == int((~np.isclose(a64, b64, atol=1e-4, rtol=1e-4)).sum())
    assert m2["max_abs"] == float(np.abs(a64 - b64).max())
    assert m2["worst"]["window"] == 13 and m2["worst"]["step"] == 2


def test_merged_flip_windows_are_the_first_ones_in_recording_order() -> None:
    parts = []
    for lo in (0, 30):
        p = TensorStats(1e-4, 1e-4, class_scores=True)
        p.flip_windows = list(range(lo, lo + 30))
        parts.append(p)
    assert merge_shards(parts).flip_windows == list(range(50))  # MAX_FLIPS_LISTED = 50


def test_worker_and_cluster_settings_are_checked() -> None:
    assert parse_workers(0, "--workers") == 0 and parse_workers(3, "--workers") == 3
    with pytest.raises(BadInputError, match=r"^--workers must be"):
        parse_workers(-1, "--workers")
    assert parse_cluster("127.0.0.1:6379", "--cluster") == "127.0.0.1:6379"
    assert parse_cluster("", "--cluster") == ""
    for bad in ("127.0.0.1", "host:notaport", "host:70000", 5):
        with pytest.raises(BadInputError, match=r"^--cluster"):
            parse_cluster(bad, "--cluster")


def test_loopback_environment_keeps_ray_on_this_machine() -> None:
    env = loopback_environment()
    assert env["RAY_USAGE_STATS_ENABLED"] == "0"
    assert env["RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER"] == "0"
    assert all(env[k].startswith("http://127.0.0.1:") for k in ("http_proxy", "https_proxy"))


# ----- a real Ray -----------------------------------------------------------------------------------
torch = pytest.importorskip("torch")

NET = '''
import torch
from torch import nn


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.enc = nn.LSTM(3, 5, num_layers=2, batch_first=True)
        self.head = nn.Linear(5, 3)

    def forward(self, x):
        y, _ = self.enc(x)
        return torch.softmax(self.head(y[:, -1]), dim=-1)


def make():
    torch.manual_seed(5)
    return Net()
'''


@pytest.fixture(scope="module")
def net(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    import importlib.util

    from seqgate.export.run import export_source

    d = tmp_path_factory.mktemp("clusternet")
    (d / "net.py").write_text(NET)
    spec = importlib.util.spec_from_file_location("seqgate_cluster_net", d / "net.py")
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    torch.save(mod.make().state_dict(), d / "w.pt")
    export_source(f"{d / 'net.py'}:make", d / "n.onnx", weights=str(d / "w.pt"))
    np.savez(d / "rec.npz", x=np.random.default_rng(4).normal(size=(96, 12, 3)).astype(np.float32))
    # atol 1e-9, rtol 0: honest float32 noise is "outside", so counts and the first divergence
    # are not trivially empty
    kw = {"recordings": [d / "rec.npz"], "synthetic": True, "batch_size": 8, "atol": 1e-9, "rtol": 0.0}
    return {"onnx": d / "n.onnx", "source": f"{d / 'net.py'}:make", "weights": str(d / "w.pt"), "kw": kw}


def _single(net: dict[str, Any]) -> Any:
    from seqgate.verify.run import verify_model

    return verify_model(net["onnx"], net["source"], net["weights"], **net["kw"])


def _same_report(one: Any, many: Any) -> None:
    a, b = one.to_json(), many.to_json()
    assert a["first_divergence"] == b["first_divergence"] and a["passed"] == b["passed"]
    assert [t["name"] for t in a["tensors"]] == [t["name"] for t in b["tensors"]]
    for ta, tb in zip(a["tensors"], b["tensors"], strict=True):
        for k in ("elements", "windows", "max_abs", "max_rel", "p99_abs", "outside", "worst", "first_bad_step",
                  "top1_agreement", "label_flips", "flip_windows"):
            assert ta["metrics"].get(k) == tb["metrics"].get(k), (ta["name"], k)
        assert ta["per_step_max_abs"] == tb["per_step_max_abs"]
        assert ta["metrics"]["mean_abs"] == pytest.approx(tb["metrics"]["mean_abs"], rel=1e-6)
        for label, entry in ta["by_recording"].items():
            assert entry["metrics"]["outside"] == tb["by_recording"][label]["metrics"]["outside"]


class _KillFirstWorker:
    """A progress receiver that SIGKILLs the worker named in the first progress line (a worker
    this test's Ray started), so its next range is lost and must be retried on another."""

    def __init__(self) -> None:
        self.killed: int | None = None
        self.lines: list[str] = []

    def start(self, stage: str, total: int | None = None) -> None:
        self.lines.append(stage)

    def advance(self, n: int = 1, detail: str = "") -> None:
        self.lines.append(detail)
        m = re.search(r"worker pid (\d+)", detail)
        if self.killed is None and m:
            self.killed = int(m.group(1))
            os.kill(self.killed, signal.SIGKILL)

    def finish(self) -> None:
        return None


@pytest.mark.ray
def test_embedded_ray_two_workers_with_a_killed_worker_equals_one_process(
        net: dict[str, Any], monkeypatch: pytest.MonkeyPatch) -> None:
    pytest.importorskip("ray")
    from seqgate.verify.run import verify_model

    one = _single(net)
    assert not one.passed and one.first_divergence is not None
    progress = _KillFirstWorker()
    many = verify_model(net["onnx"], net["source"], net["weights"], workers=2, progress=progress, **net["kw"])
    assert progress.killed is not None
    _same_report(one, many)
    assert many.workers is not None and many.workers["retried"] >= 1 and many.workers["count"] == 2
    assert sum(w["windows"] for w in many.workers["per_worker"]) == sum(r["windows"] for r in many.recordings)
    assert any(re.search(r"\d+ windows/s; \d workers \d+ windows/s", line) for line in progress.lines)


@pytest.mark.ray
def test_head_and_two_worker_nodes_on_loopback_equal_one_process(
        net: dict[str, Any], monkeypatch: pytest.MonkeyPatch) -> None:
    for k, v in loopback_environment().items():  # before any Ray process starts
        monkeypatch.setenv(k, v)
    ray = pytest.importorskip("ray")
    from ray.cluster_utils import Cluster

    from seqgate.verify.cluster import confine_to_loopback

    confine_to_loopback(ray)  # this process may have imported Ray before the environment was set
    from seqgate.verify.run import verify_model

    cluster = Cluster(initialize_head=True, head_node_args={"num_cpus": 0, "include_dashboard": False,
                                                            "node_ip_address": "127.0.0.1"})
    try:
        for _ in range(2):
            cluster.add_node(num_cpus=1, node_ip_address="127.0.0.1")
        cluster.wait_for_nodes()
        address = cluster.address
        assert address.startswith("127.0.0.1:")
        many = verify_model(net["onnx"], net["source"], net["weights"], cluster=address, **net["kw"])
    finally:
        cluster.shutdown()
    _same_report(_single(net), many)
    assert many.workers is not None and many.workers["count"] == 2 and many.workers["cluster"] == address
    assert many.settings["cluster"] == address


def test_workers_without_ray_installed_is_a_clear_error(net: dict[str, Any], monkeypatch: pytest.MonkeyPatch,
                                                        tmp_path: Path) -> None:
    import sys

    from seqgate.verify.run import verify_model

    monkeypatch.setitem(sys.modules, "ray", None)  # import ray raises ImportError
    with pytest.raises(BadInputError, match=r"seqgate\[cluster\]"):
        verify_model(net["onnx"], net["source"], net["weights"], workers=2, **net["kw"])
