import sys

from holonomic.cli import main

sys.exit(main())
