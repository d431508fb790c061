import sys

from calwarden.daemon.cli.main import main

sys.exit(main())
