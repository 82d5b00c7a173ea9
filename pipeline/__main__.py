"""Allow ``python -m pipeline``."""

import sys

from pipeline.cli import entry

sys.exit(entry())
