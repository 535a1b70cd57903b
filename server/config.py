"""Settings, read from the environment (prefix SENSORLEDGER_) with safe local defaults."""

from __future__ import annotations

from pathlib import Path

from pydantic_settings import BaseSettings, SettingsConfigDict

DEFAULT_DB_PATH = Path("data") / "sensorledger.db"


class Settings(BaseSettings):
    """Where the database is, and how the app presents itself."""

    model_config = SettingsConfigDict(env_prefix="SENSORLEDGER_", extra="ignore")

    database_url: str = f"sqlite:///{DEFAULT_DB_PATH}"
    # how long a SQLite writer waits for the write lock before giving up (503, try again)
    sqlite_busy_timeout_ms: int = 30_000
    job_poll_s: float = 1.0  # how often a server looks for jobs queued by other processes
    job_stale_after_s: float = 60.0  # a running job silent this long is resumed elsewhere
    session_days: int = 14  # how long a browser sign-in lasts


def database_url_from(db: str | None, settings: Settings | None = None) -> str:
    """A ``--db`` value (a path or a URL) as a SQLAlchemy URL; the settings' URL when absent."""
    if not db:
        return (settings or Settings()).database_url
    if "://" in db:
        return db
    return f"sqlite:///{Path(db).expanduser()}"
