import sys

from edgevib.daemon.cli import main

sys.exit(main())
