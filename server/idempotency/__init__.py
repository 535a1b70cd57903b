"""Idempotency keys: a retried POST gets the first answer again; nothing is stored twice."""

from server.idempotency.service import HEADER, check_key, digest, find, keep

__all__ = ["HEADER", "check_key", "digest", "find", "keep"]
