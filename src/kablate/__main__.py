import sys

try:
    from kablate.cli import main
except KeyboardInterrupt:  # Ctrl-C while Python imports the command line: no traceback
    sys.stderr.write("interrupted (Ctrl-C)\n")
    sys.exit(130)

main()
