"""The audit log: who changed what, when."""
