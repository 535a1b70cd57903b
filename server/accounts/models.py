"""Users, their roles, and hashed tokens (API tokens and browser sign-ins)."""

from __future__ import annotations

import enum
from datetime import datetime

from sqlalchemy import Enum, ForeignKey, String
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

    user: Mapped[User] = relationship(back_populates="tokens")
