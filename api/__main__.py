"""``python -m api``: the same as ``closure api`` (see ``closure api --help``)."""

import sys

from closure.cli import main

sys.exit(main(["api", *sys.argv[1:]]))
