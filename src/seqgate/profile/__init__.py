"""``seqgate profile``: latency per sequence length. ``run`` measures, ``inputs`` plans the inputs,
``stats`` and ``result`` turn timings into percentiles, fits and budget verdicts, ``budgets``
parses budgets. Calling the package (``seqgate.profile(...)``) runs ``run.profile_model``."""

from seqgate.util.callable import make_callable

make_callable(__name__, "seqgate.profile.run:profile_model")
