"""Small helpers with no model knowledge: atomic files, lazy framework imports, the environment
record for reports, callable packages. Nothing here imports another seqgate package but ``errors``."""
