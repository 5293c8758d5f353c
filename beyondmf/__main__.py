"""`python -m beyondmf` runs the `beyondmf` command."""

import sys

from .cli import main

sys.exit(main())
