"""``python -m streamcount``: the same as the ``streamcount`` command."""

from __future__ import annotations

import sys

from streamcount.cli import main

sys.exit(main())
