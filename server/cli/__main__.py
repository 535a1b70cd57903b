"""`python -m server.cli`: the same as the `sensorledger` command."""

from server.cli import main

raise SystemExit(main())
