"""``python -m ionwarden.daemon.cli``: the same as the ``ionwarden`` command (the daemon starts
its worker processes this way, with the interpreter it runs on)."""

import sys

from ionwarden.daemon.cli import main

sys.exit(main())
