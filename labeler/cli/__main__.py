"""``python -m labeler.cli``: the same as the ``labeler`` command."""

import sys

from labeler.cli import main

sys.exit(main())
