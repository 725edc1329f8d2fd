"""``python -m pipeline`` works like the ``downlink`` command."""

import sys

from pipeline.cli import main

sys.exit(main())
