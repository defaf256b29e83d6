"""Progress goes through a callback: the library never imports the CLI; the gate prints one stage
line per step when stderr is not a terminal (CI logs); the live bar shows user text as text."""

from __future__ import annotations

import ast
import io
from pathlib import Path
from typing import Any

import numpy as np
from typer.testing import CliRunner

from seqgate.cli.app import app

SRC = Path(__file__).resolve().parents[2] / "src" / "seqgate"
DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"
runner = CliRunner()


def _imports(path: Path) -> list[tuple[str, list[str]]]:
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module:
            found.append((node.module, [a.name for a in node.names]))
        elif isinstance(node, ast.Import):
            found += [(a.name, []) for a in node.names]
    return found


def test_library_never_imports_the_cli() -> None:
    offenders = [f"{p.relative_to(SRC)} imports {m}" for p in SRC.rglob("*.py")
                 if "cli" not in p.relative_to(SRC).parts
                 for m, _ in _imports(p) if m == "seqgate.cli" or m.startswith("seqgate.cli.")]
    assert offenders == []


def test_cli_modules_import_no_private_name_of_another_module() -> None:
    offenders = [f"{p.name}: {m}.{n}" for p in (SRC / "cli").glob("*.py")
                 for m, names in _imports(p) if m.startswith("seqgate") for n in names
                 if n.startswith("_") and not n.startswith("__")]
    assert offenders == []  # e.g. cli.verify importing cli.app._fail


class Recorder:
    """A Progress that keeps every call."""

    def __init__(self) -> None:
        self.calls: list[tuple[str, Any, Any]] = []

    def start(self, stage: str, total: int | None = None) -> None:
        self.calls.append(("start", stage, total))

    def advance(self, n: int = 1, detail: str = "") -> None:
        self.calls.append(("advance", n, detail))

    def finish(self) -> None:
        self.calls.append(("finish", None, None))


def test_verify_reports_one_stage_and_every_window() -> None:
    from seqgate.export.run import export_source
    from seqgate.verify.run import verify_model

    rec = DEMO / "pressure" / "field_week.npz"
    with np.load(rec) as z:  # the window count, read with numpy
        windows = next(int(v.shape[0]) for k, v in z.items() if v.ndim == 3)
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        onnx_path = Path(d) / "m.onnx"
        export_source(str(DEMO / "pressure" / "pressure_forecaster.keras"), onnx_path)
        progress = Recorder()
        verify_model(onnx_path, str(DEMO / "pressure" / "pressure_forecaster.keras"), recordings=[str(rec)],
                     progress=progress)
    assert progress.calls[0] == ("start", "verifying 1 window set", windows)
    assert progress.calls[-1][0] == "finish"
    assert sum(n for kind, n, _ in progress.calls if kind == "advance") == windows


def test_gate_prints_one_stage_line_per_step_when_not_a_terminal(tmp_path: Path) -> None:
    cfg = tmp_path / "gate.toml"
    cfg.write_text(f"""
[model]
source = "{DEMO / "pressure" / "pressure_forecaster.keras"}"
[verify]
recordings = ["{DEMO / "pressure" / "field_week.npz"}"]
synthetic = true
[profile]
seq_lens = [8, 32]
batch_sizes = [1]
threads = [1]
warmup = 1
min_runs = 3
min_time = 0.0
compare_source = false
""", encoding="utf-8")
    r = runner.invoke(app, ["gate", str(cfg), "--out-dir", str(tmp_path / "out")])
    assert r.exit_code in (0, 1), r.output
    lines = [ln for ln in r.stderr.splitlines() if ln.startswith("seqgate: ")]
    assert lines[0] == "seqgate: exporting"
    assert lines[1].startswith("seqgate: verifying ") and lines[1].endswith(" window sets")
    assert lines[2] == "seqgate: profiling 2 points"
    assert len(lines) == 3  # one line per stage, nothing per step
    quiet = runner.invoke(app, ["gate", str(cfg), "--out-dir", str(tmp_path / "out2"), "--quiet"])
    assert "seqgate: " not in quiet.stderr


def test_live_bar_shows_user_text_as_text() -> None:
    from rich.console import Console

    from seqgate.cli.progress import LiveBar

    buf = io.StringIO()
    bar = LiveBar(Console(file=buf, force_terminal=True, width=100))
    bar.start("verifying 2 window sets", 4)
    bar.advance(2, "recording [/] [bold]x")  # rich would fail on "[/]" if it read markup here
    bar.advance(2)
    bar.finish()
    assert "recording [/] [bold]x" in buf.getvalue()
