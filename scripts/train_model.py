"""Train, export and check flairwatch's WMH model: a thin entry point over
:mod:`flairwatch.training.loop` (needs the ``train`` extra). ``--help`` lists the options.

Research use only: the model this makes is not for diagnosis.
"""

from __future__ import annotations

import sys

from flairwatch.training.loop import main

if __name__ == "__main__":
    sys.exit(main())
