"""The app under load and faults: real server processes on SQLite and PostgreSQL.

- ``test_load.py``: 16 writers and 4 page readers against one server (SQLite, PostgreSQL) and
  against two servers sharing one PostgreSQL database.
- ``test_kills.py``: SIGKILL of the server in the middle of a refit job and in the middle of a
  stream of saves, and of ``sensorledger import-history`` half-way through a file; the checks
  are in ``checks.py`` (``integrity_ok``, ``check_sessions_whole``, ``current_fit_ids``, ...).

Every test is marked ``reliability`` (``pytest -m reliability``); ``make test`` runs them with
``SENSORLEDGER_LOAD_SECONDS`` of load per load test (default in ``harness.LOAD_SECONDS``; set 60
for a longer run).
"""
