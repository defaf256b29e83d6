"""One runner per runtime (ONNX Runtime, Keras, PyTorch), used by verify and profile alike.

Each runner maps ``{input name: array}`` to ``{tensor name: array}`` with probes (``run``) and
offers a timed call without probes (``timed_call``). Tensor names: the ONNX graph's output names
for model outputs, probe names for probes. Axes follow DESIGN.md: outputs as the model returns
them (``[batch, time, ...]``); probe ``hidden_sequence`` ``[batch, time, 1, hidden]`` (index t =
state after consuming input t, for either direction), ``hidden_final``/``cell_final``
``[batch, 1, hidden]``. ``factory.open_source_runner`` loads a model source into its runner;
``onnx.OnnxRunner`` takes the ONNX side. Framework outputs are flattened by the one rule of
``seqgate.util.outputs`` (insertion order), the rule the PyTorch exporter names outputs by."""
