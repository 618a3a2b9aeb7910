"""`python -m ranktide.cli`: the command line."""

import sys

from ranktide.cli.main import main

sys.exit(main())
