"""Who is asking: a Bearer token on the API, a sign-in cookie on pages."""

from collections.abc import Callable
from typing import Annotated

from fastapi import Depends, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from server.accounts import service
from server.accounts.csrf import COOKIE
from server.accounts.models import Role, TokenKind, User
from server.db import SessionDep
from server.errors import NotSignedIn
from server.flags.service import count_needing_attention

bearer = HTTPBearer(auto_error=False, description="A token from `sensorledger token create`")


def api_user(
    session: SessionDep,
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(bearer)],
) -> User:
    if credentials is None:
        raise NotSignedIn(
            "send 'Authorization: Bearer <token>'; create one with `sensorledger token create NAME`"
        )
    return service.user_for_token(session, credentials.credentials, TokenKind.api)


def page_user(request: Request, session: SessionDep) -> User:
    raw = request.cookies.get(COOKIE)
    if not raw:
        raise NotSignedIn("please sign in")
    user = service.user_for_token(session, raw, TokenKind.browser)
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
