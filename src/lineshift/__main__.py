"""``python -m lineshift`` is the ``lineshift`` command."""

import sys

from lineshift.cli.app import main

sys.exit(main())
