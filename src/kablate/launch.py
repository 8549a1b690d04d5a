"""The `kablate` command's entry point: Ctrl-C while Python is still importing the command line
(click, then torch and optuna inside it) ends in one line and exit 130, not a traceback. The
installed script and ``python -m kablate`` both start here. It ends the process without the
interpreter's teardown (teardown.py): with torch loaded, that alone takes seconds."""

import sys


def main() -> None:
    try:
        from kablate.cli import main as cli_main
    except KeyboardInterrupt:
        sys.stderr.write("interrupted (Ctrl-C)\n")
        sys.exit(130)
    try:
        cli_main()
    except SystemExit as exc:
        code = exc.code
    else:
        code = 0
    from kablate.teardown import exit_without_teardown

    exit_without_teardown(code)  # every file is written by now: skip the seconds of teardown
