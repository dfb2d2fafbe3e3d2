"""Quality gate on the shift suite: new model vs old model vs an intensity baseline.

A thin entry point; the benchmark lives in :mod:`flairwatch.research.quality_run` (usage and
outputs in its docstring, ``--help`` for the options). Research use only: synthetic series,
not patients.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from flairwatch.research.quality_run import main

if __name__ == "__main__":
    sys.exit(main())
