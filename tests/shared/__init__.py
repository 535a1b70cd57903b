"""Tests of the calibration engine (package ``shared``)."""
