"""``seqgate gate``: one TOML config (``config``) drives export, verify and profile and writes the
reports (``run``). Calling the package (``seqgate.gate(...)``) runs ``run.run_gate``."""

from seqgate.util.callable import make_callable

make_callable(__name__, "seqgate.gate.run:run_gate")
