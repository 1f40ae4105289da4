"""``python -m metalay.cli``: the same as the ``metalay`` command."""

import sys

from metalay.cli import main

sys.exit(main())
