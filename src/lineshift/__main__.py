"""``python -m lineshift`` is the ``lineshift`` command."""

import sys

from .cli import main

sys.exit(main())
