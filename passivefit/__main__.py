import sys

from passivefit.cli import main

sys.exit(main())
