"""``python -m leadline``: the ``leadline`` command."""

import sys

from leadline.adapters.cli import main

sys.exit(main())
