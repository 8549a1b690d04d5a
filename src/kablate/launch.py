"""The `kablate` command's entry point: Ctrl-C while Python is still importing the command line
(click, then torch and optuna inside it) ends in one line and exit 130, not a traceback. The
installed script and ``python -m kablate`` both start here."""

import sys


def main() -> None:
    try:
        from kablate.cli import main as cli_main
    except KeyboardInterrupt:
        sys.stderr.write("interrupted (Ctrl-C)\n")
        sys.exit(130)
    cli_main()
