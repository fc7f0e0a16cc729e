"""``python -m ventcast``: the command line (the same as the ``ventcast`` console script)."""

import sys

from ventcast.app.cli import main

sys.exit(main())
