"""`python -m tinyrnnt`: the same command line as `tinyrnnt`."""

import sys

from tinyrnnt.cli import main

sys.exit(main())
