"""``python -m attnpos.cli`` = ``attnpos``."""

import sys

from . import main

sys.exit(main())
