"""Pagination shared by every list."""

from __future__ import annotations

from typing import Annotated, Generic, TypeVar

from fastapi import Query
from pydantic import BaseModel
from sqlalchemy import Select, func, select
from sqlalchemy.orm import Session

from server.db import ID_MAX


class PageParams(BaseModel):
    page: int = 1
    per_page: int = 50

    @property
    def offset(self) -> int:
        return (self.page - 1) * self.per_page


def page_params(
    # bounded so that the row offset fits any database's integer (a larger page is a 422)
    page: Annotated[int, Query(ge=1, le=ID_MAX, description="1-based page number")] = 1,
    per_page: Annotated[int, Query(ge=1, le=500, description="items per page")] = 50,
) -> PageParams:
    return PageParams(page=page, per_page=per_page)


T = TypeVar("T")


class Page(BaseModel, Generic[T]):
    items: list[T]
    total: int
    page: int
    per_page: int


def paged(session: Session, query: Select[T], page: PageParams) -> tuple[list[T], int]:
    """One page of ``query`` (already ordered) and how many rows it has in all."""
    total = session.scalar(select(func.count()).select_from(query.subquery())) or 0
    rows = session.scalars(query.offset(page.offset).limit(page.per_page))
    return list(rows), total
