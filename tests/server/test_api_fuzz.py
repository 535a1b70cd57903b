"""Property-based fuzzing of the API from its own OpenAPI schema (schemathesis, hypothesis): with
an admin's token, every operation gets generated requests (valid and invalid ones); no answer may
be a 5xx, and every answer must match the schema the operation declares for its status.

At least 1,000 cases over every operation (``EXAMPLES`` per operation, derandomized: the same
cases on every run), on a seeded SQLite file; about a minute on one core. (Its pytest plugin does
not run under this pytest, so the operations are driven with hypothesis directly.)"""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import schemathesis
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from schemathesis.checks import not_a_server_error, response_schema_conformance
from schemathesis.generation import GenerationMode
from sqlalchemy import select

from server.accounts import service as accounts
from server.accounts.models import Role, TokenKind
from server.app import create_app
from server.calibrations.models import CalibrationSession
from server.config import Settings
from server.flags.models import Flag
from tests.web.seed import IR_TYPE, seed

EXAMPLES = 60  # per operation; 24 operations


@pytest.fixture(scope="module")
def fuzzed(
    tmp_path_factory: pytest.TempPathFactory,
) -> Iterator[tuple[Any, dict[str, str], dict[str, Any]]]:
    path: Path = tmp_path_factory.mktemp("fuzz") / "sensorledger.db"
    url = f"sqlite:///{path}"
    fleet = seed(url)
    app = create_app(Settings(database_url=url))
    with app.state.sessionmaker() as session:
        user = accounts.create_user(session, "fuzz-admin", Role.admin, password="fuzz-pw")
        raw = accounts.create_token(session, user, "fuzzing")
        session.commit()
        real = {
            "serial": fleet.calibrated,
            "name": IR_TYPE,
            "session_id": session.scalars(select(CalibrationSession.id)).first(),
            "flag_id": session.scalars(select(Flag.id)).first() or 1,
            "job_id": 1,
        }
    yield app, {"Authorization": f"Bearer {raw}"}, real
    app.state.engine.dispose()


def test_no_5xx_and_every_answer_matches_its_schema(fuzzed, figures) -> None:
    """Each operation in turn (schemathesis' strategies under hypothesis' ``given``); every
    failing operation is reported, not only the first."""
    app, token, real = fuzzed
    api = schemathesis.openapi.from_asgi("/openapi.json", app)
    cases: Counter[str] = Counter()
    statuses: Counter[int] = Counter()
    failures: dict[str, str] = {}
    operations = [result.ok() for result in api.get_all_operations()]
    for operation in operations:
        label = f"{operation.method.upper()} {operation.path}"
        strategies = [
            operation.as_strategy(GenerationMode.POSITIVE),
            operation.as_strategy(GenerationMode.NEGATIVE),
        ]
        names = re.findall(r"{(\w+)}", operation.path)
        if names:  # valid requests on the seeded units, types, sessions and flags too
            strategies.append(
                operation.as_strategy(
                    GenerationMode.POSITIVE, path_parameters={n: real[n] for n in names}
                )
            )

        @given(case=st.one_of(strategies))
        @settings(
            max_examples=EXAMPLES,
            deadline=None,
            derandomize=True,
            database=None,
            suppress_health_check=list(HealthCheck),
        )
        def fuzz(case: Any) -> None:
            cases[label] += 1  # noqa: B023 (run at once, inside this turn of the loop)
            response = case.call(headers=token)
            statuses[response.status_code] += 1
            case.validate_response(
                response, checks=[not_a_server_error, response_schema_conformance]
            )

        try:
            fuzz()
        except Exception as exc:  # the operation's failure, shrunk by hypothesis
            failures[label] = f"{type(exc).__name__}: {exc}"[:3000]
    figures(
        f"API fuzzing: {sum(cases.values())} cases over {len(cases)} operations; statuses "
        + ", ".join(f"{code}: {n}" for code, n in sorted(statuses.items()))
    )
    assert failures == {}
    served = {
        f"{method.upper()} {path}"
        for path, item in app.openapi()["paths"].items()
        for method in item
    }
    assert set(cases) == served
    assert sum(cases.values()) >= 1000


def test_an_id_too_large_for_the_database_is_a_422_on_pages_too(fuzzed) -> None:
    """What the fuzzing found on /api/v1/jobs/{job_id} (an OverflowError, a 500), on the pages
    with ids in their paths."""
    from fastapi.testclient import TestClient

    from server.accounts import csrf

    app, _, real = fuzzed
    with app.state.sessionmaker() as session:
        user = accounts.get_user(session, "fuzz-admin")
        raw = accounts.create_token(session, user, "pages", TokenKind.browser)
        session.commit()
    huge = 2**63
    with TestClient(app, cookies={csrf.COOKIE: raw}) as client:
        for path in (
            f"/types/{IR_TYPE}/jobs/{huge}",
            f"/types/{IR_TYPE}?job={huge}",
            f"/attention/flags/{huge}/chart",
            f"/units/{real['serial']}/calibrations/{huge}/report",
        ):
            assert client.get(path).status_code == 422, path
        token = {csrf.HEADER: csrf.token_of(raw)}
        posts = (
            f"/units/{real['serial']}/calibrations/{huge}/void",
            f"/attention/flags/{huge}/acknowledge",
            f"/admin/tokens/{huge}/revoke",
        )
        for path in posts:
            assert client.post(path, headers=token).status_code == 422, path
