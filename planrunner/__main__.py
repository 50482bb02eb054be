"""`python -m planrunner` runs the command line."""

import sys

from planrunner.cli.main import main

sys.exit(main())
