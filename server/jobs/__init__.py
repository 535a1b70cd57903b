"""Background jobs kept as database rows: refits, fleet comparisons, overdue sweeps."""
