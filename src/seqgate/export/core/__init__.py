"""Framework-free export core: the graph builder (the only place that makes ONNX nodes), weight
packing into ONNX W/R/B (pure NumPy, the gate-order table), native RNN/GRU/LSTM nodes with their
probes, and activations."""
