"""``python -m stateworth`` is the ``stateworth`` command."""

import sys

from stateworth.clients.cli import main

sys.exit(main())
