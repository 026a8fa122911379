"""pytest: doctests run over the package; the entry-point module is not importable as a test."""

collect_ignore = ["streamdet/__main__.py"]
