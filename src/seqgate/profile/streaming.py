"""Per-call latency of a streaming file: what an edge loop pays for each new chunk of samples.

For each chunk size c (``[profile] chunks``, default 1 and 16) at batch ``batch`` and each thread
count: inputs of c steps (``seqgate.profile.inputs``, seeded), and the states a previous call
returned (a warm, non-zero state: a state's values do not change the work of a call). The timed
call is the bare ``session.run`` of every graph output with the states fed, timed by the
profiler's own :func:`time_call` (same warm-up, run count and time rules as the sweep).

Reported per chunk: p50/p90/p99 per call in ms and per new sample in µs (the call's figure
divided by c). A call budget (``--call-budget C=MS``, ``[[profile.call_budget]] seq_len = C,
ms = MS``: the ordinary budget type, its length read as steps per call) holds when the chosen
percentile of the call at that chunk size is ≤ MS at every thread count measured; a budget at a
chunk size not in the list adds that size.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from seqgate.profile.inputs import InputPlan, make_inputs
from seqgate.profile.stats import summarize_ns
from seqgate.settings import Budget


def profile_calls(model: Any, plans: list[InputPlan], chunks: list[int], call_budgets: list[Budget],
                  batch: int, thread_list: list[int], seed: int, counts: tuple[int, int, float],
                  percentile: int, timer: Callable[..., list[int]]) -> dict[str, Any]:
    """The ``streaming`` section of a profile report (module docstring)."""
    from seqgate.export.streaming import read_streaming

    info = read_streaming(model)
    assert info is not None, "not a streaming file"
    sizes = sorted({*chunks, *(b.seq_len for b in call_budgets)})
    points = []
    for th in thread_list:
        session = _session(model, th)
        names = [o.name for o in session.get_outputs()]
        for c in sizes:
            feeds = make_inputs(plans, batch, c, seed)
            first = dict(zip(names, session.run(names, feeds), strict=True))
            full = {**feeds, **{s["input"]: first[s["output"]] for s in info["states"]}}
            run = session.run
            stats = summarize_ns(timer(lambda run=run, full=full, names=names: run(names, full), *counts))
            points.append({"chunk": c, "batch": batch, "threads": th, "runs": stats.runs,
                           "p50_ms": stats.p50_ms, "p90_ms": stats.p90_ms, "p99_ms": stats.p99_ms,
                           "us_per_sample": {f"p{q}": stats.at(q) * 1000.0 / c for q in (50, 90, 99)}})
    verdicts = [_verdict(b, points, percentile) for b in call_budgets]
    return {"passed": all(v["passed"] for v in verdicts), "percentile": percentile, "chunks": sizes,
            "states": len(info["states"]), "points": points, "call_budgets": verdicts}


def _verdict(b: Budget, points: list[dict[str, Any]], q: int) -> dict[str, Any]:
    at = [p for p in points if p["chunk"] == b.seq_len]
    worst = max(p[f"p{q}_ms"] for p in at)
    return {"chunk": b.seq_len, "budget_ms": b.ms, "measured_ms": worst, "percentile": q,
            "passed": worst <= b.ms, "threads": [p["threads"] for p in at]}


def _session(model: Any, threads: int) -> Any:
    import onnxruntime as ort

    from seqgate.runtimes.onnx import session_options

    opts, _ = session_options(threads, timing=True)
    return ort.InferenceSession(model.SerializeToString(), opts, providers=["CPUExecutionProvider"])
