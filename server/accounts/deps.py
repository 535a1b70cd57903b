"""Who is asking: a Bearer token on the API, a sign-in cookie on pages."""

from collections.abc import Callable
from typing import Annotated

from fastapi import BackgroundTasks, Depends, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from server.accounts import service
from server.accounts.csrf import COOKIE
from server.accounts.models import Role, Token, TokenKind, User
from server.db import READ_METHODS, SessionDep, utcnow
from server.errors import NotSignedIn
from server.flags.service import count_needing_attention

bearer = HTTPBearer(auto_error=False, description="A token from `sensorledger token create`")


def _used(request: Request, background: BackgroundTasks, token: Token) -> User:
    """The token's user. Its last use is written at most once a minute: by a writing request
    in its own transaction (kept if the route commits), by a reading one after the answer in a
    short transaction of its own (its reading session stays reading)."""
    if service.needs_touch(token):
        if request.method in READ_METHODS:
            background.add_task(service.touch, request.app.state.sessionmaker, token.id)
        else:
            token.last_used_at = utcnow()
    return token.user


def api_user(
    request: Request,
    session: SessionDep,
    background: BackgroundTasks,
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(bearer)],
) -> User:
    if credentials is None:
        raise NotSignedIn(
            "send 'Authorization: Bearer <token>'; create one with `sensorledger token create NAME`"
        )
    token = service.token_for(session, credentials.credentials, TokenKind.api)
    return _used(request, background, token)


def page_user(request: Request, session: SessionDep, background: BackgroundTasks) -> User:
    raw = request.cookies.get(COOKIE)
    if not raw:
        raise NotSignedIn("please sign in")
    token = service.token_for(session, raw, TokenKind.browser)
    user = _used(request, background, token)
    request.state.token_id = token.id  # e.g. kept when an admin changes their own password
    request.state.user = user
    request.state.attention_count = count_needing_attention(session)
    return user


def _requiring(base: Callable[..., User], role: Role) -> Callable[..., User]:
    def dependency(user: Annotated[User, Depends(base)]) -> User:
        service.require_role(user, role)
        return user

    return dependency


ApiViewer = Annotated[User, Depends(api_user)]
ApiTechnician = Annotated[User, Depends(_requiring(api_user, Role.technician))]
ApiAdmin = Annotated[User, Depends(_requiring(api_user, Role.admin))]
PageViewer = Annotated[User, Depends(page_user)]
PageTechnician = Annotated[User, Depends(_requiring(page_user, Role.technician))]
PageAdmin = Annotated[User, Depends(_requiring(page_user, Role.admin))]
