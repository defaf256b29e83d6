"""What a model source is and how it is loaded safely: ``spec`` parses a source string, ``keras``
loads ``.keras``/``.h5`` files with ``safe_mode`` on, ``keras_graph`` walks a loaded Keras model,
``torch`` imports a ``FILE.py:factory`` and loads its state dict with ``weights_only=True``."""
