"""``python -m controller`` is the same as ``squall``."""

import sys

from controller.cli import main

sys.exit(main())
