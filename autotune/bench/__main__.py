"""``python -m autotune.bench``: the benchmark study (see :mod:`autotune.bench.command`)."""

import sys

from autotune.bench.command import main

sys.exit(main())
