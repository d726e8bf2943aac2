"""`python -m passivefit.cli`: the same as the `passivefit` command."""

import sys

from passivefit.cli import main

sys.exit(main())
