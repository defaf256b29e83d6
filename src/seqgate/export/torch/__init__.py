"""PyTorch capture through ``torch.fx``: ``capture`` traces and dispatches each node through the
explicit tables of ``registry`` (modules, functions, methods); ``inputs`` infers the input spec."""
