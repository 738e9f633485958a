"""``python -m lensview.cli``: the same as the ``lensview`` command."""

import sys

from . import main

sys.exit(main())
