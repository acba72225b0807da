"""Command line: a thin shell over the Python API. Filled by the foundation stage."""


def main(argv=None) -> int:  # pragma: no cover - replaced by the foundation stage
    raise SystemExit("optgrade: command line not built yet")
