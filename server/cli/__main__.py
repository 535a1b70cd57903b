"""`python -m server.cli` is `sensorledger`."""

import sys

from server.cli import main

sys.exit(main())
