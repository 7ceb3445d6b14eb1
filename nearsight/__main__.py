"""`python -m nearsight ...`: the same as the `nearsight` command."""

import sys

from nearsight.indexer.cli import main

sys.exit(main())
