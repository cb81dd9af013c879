"""Moved to :mod:`closure.service.client`; this path stays for one release as an alias of that
module (the same module object, so private names and monkeypatching keep working)."""

import sys

from closure.service import client as _module

sys.modules[__name__] = _module
