"""Users, their roles, hashed tokens (API tokens and browser sign-ins) and sign-in throttling."""

from __future__ import annotations

import enum
from datetime import datetime

from sqlalchemy import Enum, ForeignKey, Integer, String, UniqueConstraint
from sqlalchemy.orm import Mapped, mapped_column, relationship

from server.db import Base, UTCDateTime, utcnow


class Role(enum.StrEnum):
    viewer = "viewer"
    technician = "technician"
    admin = "admin"


ROLE_RANK = {Role.viewer: 0, Role.technician: 1, Role.admin: 2}


class TokenKind(enum.StrEnum):
    api = "api"
    browser = "browser"


class User(Base):
    __tablename__ = "user_account"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    role: Mapped[Role] = mapped_column(
        Enum(Role, native_enum=False, length=16, validate_strings=True)
    )
    password_hash: Mapped[str | None] = mapped_column(String(256))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    # set: the user may not sign in and none of their tokens works (all revoked when disabled)
    disabled_at: Mapped[datetime | None] = mapped_column(UTCDateTime)

    tokens: Mapped[list[Token]] = relationship(back_populates="user")


class Token(Base):
    """Only the SHA-256 of a token is stored; the token itself is shown once."""

    __tablename__ = "token"

    id: Mapped[int] = mapped_column(primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("user_account.id"), index=True)
    name: Mapped[str] = mapped_column(String(64))
    kind: Mapped[TokenKind] = mapped_column(
        Enum(TokenKind, native_enum=False, length=16, validate_strings=True)
    )
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    expires_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    revoked_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    # to the minute: written at most once a minute per token (server.accounts.service.TOUCH_EVERY)
    last_used_at: Mapped[datetime | None] = mapped_column(UTCDateTime)

    user: Mapped[User] = relationship(back_populates="tokens")


class ThrottleKind(enum.StrEnum):
    user = "user"  # a user name as typed (stripped, lower-cased), known or not
    address = "address"  # the client's IP address


class SigninThrottle(Base):
    """Failed sign-ins in a row of one user name or one address, and until when it must wait.
    In the database, so every server process sees the same count."""

    __tablename__ = "signin_throttle"
    __table_args__ = (UniqueConstraint("kind", "key"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    kind: Mapped[ThrottleKind] = mapped_column(
        Enum(ThrottleKind, native_enum=False, length=16, validate_strings=True)
    )
    key: Mapped[str] = mapped_column(String(128))
    failures: Mapped[int] = mapped_column(Integer, default=0)
    last_failure_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow, index=True)
    locked_until: Mapped[datetime | None] = mapped_column(UTCDateTime)
