"""Allow `python -m eaves`."""

import sys

from eaves.cli import main

sys.exit(main())
