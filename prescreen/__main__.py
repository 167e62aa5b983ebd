"""Allow ``python -m prescreen``."""

import sys

from prescreen.cli.main import main

sys.exit(main())
