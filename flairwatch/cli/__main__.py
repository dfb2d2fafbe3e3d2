"""``python -m flairwatch.cli``: the same as the ``flairwatch`` console script."""

from __future__ import annotations

import sys

from flairwatch.cli import main

sys.exit(main())
