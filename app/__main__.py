import sys

from plantrig.cli import main

sys.exit(main())
