"""``python -m autotune.cli``: the ``autotune`` command run by this Python."""

import sys

from autotune.cli.parser import main

sys.exit(main())
