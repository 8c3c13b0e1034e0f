"""`python -m waves.screen SHEET --out DIR ...` (same as `waves screen`)."""

import sys

from waves.screen.command import main

sys.exit(main())
