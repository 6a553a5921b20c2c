import sys

from sigmad.daemon.cli.main import main

sys.exit(main())
