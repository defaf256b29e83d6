"""Keras 3 capture: ``walk`` visits the functional graph and looks each layer up in ONE table
(``layers.LAYERS``, which includes ``recurrent.RECURRENT_LAYERS``); ``call`` is what a mapping
receives."""
