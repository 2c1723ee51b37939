"""``python -m roomcorr``: the same as the ``roomcorr`` command."""

import sys

try:
    from roomcorr.cli import main
except KeyboardInterrupt:  # Ctrl-C while Python starts: one line, exit 130 (128 + SIGINT)
    sys.stderr.write("roomcorr: interrupted\n")
    sys.exit(130)

sys.exit(main())
