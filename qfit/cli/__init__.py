"""cli: the command line over the library (`qfit check`, `qfit budget`)."""
from qfit.cli.main import EXIT_BAD_INPUT, EXIT_FAIL, EXIT_OK, build_parser, main  # noqa: F401
