"""``python -m calibration.cli``: the same as the ``equitheta`` command."""

import sys

from calibration.cli import main

sys.exit(main())
