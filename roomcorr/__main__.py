"""``python -m roomcorr``: the same as the ``roomcorr`` command."""

import sys

from roomcorr.cli import main

sys.exit(main())
