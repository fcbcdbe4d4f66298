"""``python -m doseattr``: the same as the ``doseattr`` command."""

import sys

from doseattr.cli import main

sys.exit(main())
