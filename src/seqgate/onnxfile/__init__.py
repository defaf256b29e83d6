"""Reading what ``seqgate export`` wrote: loading an ONNX file (``load``), its metadata and probe map
(``probes``), the cost model (``costs``) and the ``inspect`` summary. Everything after export
reads the file through this package."""
