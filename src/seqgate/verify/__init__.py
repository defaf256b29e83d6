"""``seqgate verify``: recordings (``recordings``, ``csv_windows``), synthetic stress sets
(``synthetic``), the comparison (``compare``), the run over recordings (``run``) and the
``onnx.reference`` third opinion (``oracle``). Calling the package (``seqgate.verify(...)``) runs
``run.verify_model``."""

from seqgate.util.callable import make_callable

make_callable(__name__, "seqgate.verify.run:verify_model")
