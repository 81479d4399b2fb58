"""``python -m strayline`` is the ``strayline`` command."""

import sys

from strayline.cli import main

sys.exit(main())
