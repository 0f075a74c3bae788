"""``python -m attnscope`` runs the command line."""

import sys

from attnscope.cli import main

sys.exit(main())
