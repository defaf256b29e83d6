"""The ``seqgate`` command line: thin typed commands that call the library and print with rich.

Exit codes: 0 passed; 1 a check failed; 2 bad usage or bad input; 3 unsupported model;
4 an internal error (a bug in seqgate), reported in one paragraph without a traceback.
No framework is imported until a command needs it, so ``seqgate --help`` is fast.
"""

from __future__ import annotations

import importlib
import json
import os
import sys
from pathlib import Path
from typing import Annotated, Any

import typer

from seqgate import __version__
from seqgate.cli.errors import exit_for, exits_on_error, report_internal_error
from seqgate.errors import SeqgateError

app = typer.Typer(
    name="seqgate",
    help="Export recurrent Keras/PyTorch models to ONNX, verify every hidden state, "
    "profile CPU latency and gate releases.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"seqgate {__version__}")
        raise typer.Exit(0)


@app.callback()
def _root(
    version: Annotated[bool, typer.Option("--version", callback=_version, is_eager=True,
                                          help="Print the version and exit.")] = False,
) -> None:
    """seqgate: a release gate for recurrent sequence models shipped through ONNX Runtime."""


@app.command()
@exits_on_error
def export(
    source: Annotated[str, typer.Argument(help="Keras .keras/.h5 file, or FILE.py:FACTORY for PyTorch.")],
    out: Annotated[Path, typer.Option("-o", "--out", help="Where to write the ONNX file.")],
    opset: Annotated[int | None, typer.Option(help="ONNX opset (default 17).")] = None,
    force: Annotated[bool, typer.Option("--force", help="Overwrite OUT if it exists.")] = False,
    weights: Annotated[str | None, typer.Option(help="PyTorch state dict (.pt) for a factory source.")] = None,
    untrained: Annotated[bool, typer.Option(
        "--untrained", help="PyTorch: export the factory's initial parameters without --weights "
        "(a test or placeholder model); recorded in the file and shown in every report.")] = False,
    input_spec: Annotated[list[str] | None, typer.Option(
        "--input", help="PyTorch input NAME:DIM,DIM,...[:DTYPE][=LOW..HIGH]: DIM an integer, a symbolic "
        "name or NAME+K/NAME-K; DTYPE float32, int64, int32 or bool; LOW..HIGH the range integers are "
        "drawn from (ints or dims, e.g. 1..time); NAME may be PARAM.KEY, a tensor of a dict or "
        "dataclass parameter; repeatable.")] = None,
    custom_code: Annotated[Path | None, typer.Option(
        "--custom-code", help="Keras: run this Python file first; it defines and registers the model's "
        "custom classes (e.g. a custom RNN cell). Without it such models are refused.")] = None,
    streaming: Annotated[bool | None, typer.Option(
        "--streaming/--no-streaming", help="Give every recurrent layer a state input and output, so the "
        "file runs a stream chunk by chunk (default: only for Keras stateful=True layers).")] = None,
) -> None:
    """Write the ONNX graph of a trained model, with native RNN/GRU/LSTM ops and a probe map."""
    from seqgate.export.run import DEFAULT_OPSET, export_source

    if custom_code is not None:
        from seqgate.sources.keras import load_custom_code

        load_custom_code(custom_code)

    options = {"inputs": input_spec} if input_spec else {}
    res = export_source(source, out, opset or DEFAULT_OPSET, force, weights, untrained, streaming,
                        custom_code=custom_code, **options)
    n_nodes = len(res.model.graph.node)
    typer.echo(f"wrote {res.path} (opset {res.opset}, {n_nodes} nodes, {res.probes} probes)")
    states = [i.name for i in res.model.graph.input if i.type.HasField("optional_type")]
    if states:
        typer.echo(f"streaming: {len(states)} state inputs ({', '.join(states)}); feed each *_out back "
                   f"as its *_in on the next call (metadata seqgate.streaming)")
    from seqgate.export.torch.asserts import read_skipped
    from seqgate.export.torch.branches import ranged_note, read_ranged

    for line in read_skipped(res.model):
        typer.echo(f"note: assert on traced values taken to hold (the ONNX file does not check it): {line}")
    for entry in read_ranged(res.model):
        typer.echo(f"note: {ranged_note(entry)}")
    if untrained:
        typer.echo("note: UNTRAINED model (--untrained): exported with the factory's initial parameters.")


@app.command()
@exits_on_error
def inspect(
    model: Annotated[Path, typer.Argument(help="ONNX file written by seqgate export.")],
    as_json: Annotated[bool, typer.Option("--json", help="Print JSON instead of tables.")] = False,
) -> None:
    """Show an exported file: inputs, outputs, layers with costs, probes and metadata."""
    from seqgate.onnxfile.inspect import describe
    from seqgate.onnxfile.load import load_onnx

    info = describe(load_onnx(model))
    if as_json:
        typer.echo(json.dumps(info, indent=2, sort_keys=True))
        return
    _print_inspection(info)


def _print_inspection(info: dict) -> None:  # type: ignore[type-arg]
    from rich.console import Console
    from rich.table import Table

    c = Console(highlight=False)  # names are user text: every cell below is plain Text
    io = Table(title=f"tensors (opset {info['opset']})")
    for col in ("role", "name", "dtype", "dims"):
        io.add_column(col)
    for role in ("inputs", "outputs"):
        for t in info[role]:
            io.add_row(*_plain(role[:-1], t["name"], t["dtype"], str(t["dims"])))
    c.print(io)
    lt = Table(title="layers")
    for col in ("layer", "kind", "ONNX nodes", "params", "MACs/step", "MACs/sequence"):
        lt.add_column(col, justify="right" if col.startswith(("params", "MACs")) else "left")
    for r in info["layers"]:
        lt.add_row(*_plain(r["layer"], r["kind"], " ".join(r["nodes"]) or "(none at inference)",
                           f"{r['params']:,}", f"{r['macs_per_step']:,}", f"{r['macs_per_sequence']:,}"))
    tot = info["totals"]
    lt.add_row("total", "", "", f"{tot['params']:,}", f"{tot['macs_per_step']:,}",
               f"{tot['macs_per_sequence']:,}", style="bold")
    c.print(lt)
    pt = Table(title=f"probes ({len(info['probes'])})")
    for col in ("probe", "kind", "layer", "direction", "ONNX value"):
        pt.add_column(col)
    for p in info["probes"]:
        pt.add_row(*_plain(p["name"], p["kind"], p["layer"], p["direction"], p["value"]))
    c.print(pt)
    mt = Table(title="metadata")
    mt.add_column("key")
    mt.add_column("value")
    for k, v in sorted(info["metadata"].items()):
        mt.add_row(*_plain(k, v))
    c.print(mt)


def _plain(*cells: object) -> list[Any]:
    """Table cells as rich ``Text``: user names like ``head [out]`` are shown, not read as markup."""
    from rich.text import Text

    return [Text(str(x)) for x in cells]


# Each command module defines ``register(app)``; list it here so ``seqgate --help`` shows it.
# Command modules must import no framework at module level.
COMMAND_MODULES: tuple[str, ...] = ("seqgate.cli.verify", "seqgate.cli.profile", "seqgate.cli.gate")

for _module in COMMAND_MODULES:
    importlib.import_module(_module).register(app)


def main() -> None:
    """Console-script entry point."""
    from seqgate.cli import errors as cli_errors

    try:
        app()
    except SystemExit:
        if cli_errors.interrupted:
            # An interrupt that landed inside an import can leave CPython's "unhandled
            # KeyboardInterrupt" mark set, and the interpreter would then end itself with SIGINT
            # (exit -2) instead of 130. The run has cleaned up and said so: end now, with 130.
            sys.stdout.flush()
            sys.stderr.flush()
            os._exit(130)
        raise
    except (SeqgateError, OSError) as e:  # raised outside a command (typer's own parsing)
        raise SystemExit(exit_for(e).exit_code) from None
    except KeyboardInterrupt:
        sys.stderr.write("interrupted\n")
        raise SystemExit(130) from None
    except Exception as e:  # a bug in seqgate: say so in one paragraph, keep the traceback opt-in
        if os.environ.get("SEQGATE_DEBUG"):
            raise
        raise SystemExit(report_internal_error(e)) from None


if __name__ == "__main__":
    main()
