"""``python -m leadline.adapters.cli``: the ``leadline`` command."""

import sys

from . import main

sys.exit(main())
