"""``python -m worker``: the same as ``closure worker`` (see ``closure worker --help``)."""

import sys

from closure.cli import main

sys.exit(main(["worker", *sys.argv[1:]]))
