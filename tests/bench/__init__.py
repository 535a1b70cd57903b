"""Engine benchmark: ``python -m tests.bench`` (not collected by pytest; see __main__.py)."""
