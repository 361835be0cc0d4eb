import sys

from hierarchy.cli import main

sys.exit(main())
