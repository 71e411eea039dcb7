"""``python -m recon`` is the ``recon`` command."""

import sys

from .cli import main

sys.exit(main())
