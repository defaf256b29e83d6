"""``seqgate export``: ``run`` writes a model source to an ONNX file; ``core`` builds the graph,
``keras`` and ``torch`` capture the frameworks. Calling the package (``seqgate.export(...)``)
runs ``run.export_source``."""

from seqgate.util.callable import make_callable

make_callable(__name__, "seqgate.export.run:export_source")
