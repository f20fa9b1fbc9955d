import sys

from benchsuite.cli import main

sys.exit(main())
