"""sensorledger's test suites (a package, so that ``python -m tests.bench`` runs)."""
