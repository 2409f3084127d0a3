"""Allow ``python -m ibprep``."""

import sys

from .cli import main

sys.exit(main())
