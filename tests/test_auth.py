"""Accounts, hashed tokens and passwords, CSRF on browser sessions, and each role's allowed and
refused routes."""

from __future__ import annotations

import re

import pytest
from sqlalchemy import select

from service import storage as st
from service.cli.main import main as cli_main
from service.storage import sha256_hex
from service.web.auth import AuthError, create_token, create_user, get_user, update_user
from tests.service_support import PASSWORD, make_lab


@pytest.fixture()
def lab(tmp_path):
    lab = make_lab(tmp_path)
    yield lab
    lab.services.storage.dispose()


@pytest.fixture(scope="module")
def shared_lab(tmp_path_factory):
    # One lab for the read-mostly role checks (making people hashes passwords, which is slow).
    lab = make_lab(tmp_path_factory.mktemp("roles"))
    yield lab
    lab.services.storage.dispose()


def _csrf(page: bytes) -> str:
    match = re.search(rb'name="csrf_token" value="([^"]+)"', page)
    assert match, "page carries no CSRF token"
    return match.group(1).decode()


def login(client, username: str, password: str = PASSWORD):
    token = _csrf(client.get("/login").data)
    return client.post(
        "/login", data={"username": username, "password": password, "csrf_token": token}
    )


def test_account_rules(lab):
    storage = lab.services.storage
    with pytest.raises(AuthError, match="username"):
        create_user(storage, "no spaces please", "operator")
    with pytest.raises(AuthError, match="roles must be"):
        create_user(storage, "carl", "janitor")
    with pytest.raises(AuthError, match="at least 10"):
        create_user(storage, "carl", "operator", password="short")
    with pytest.raises(AuthError, match="already exists"):
        create_user(storage, "olga", "operator")
    user = create_user(storage, "carl", ["auditor", "operator"], password=PASSWORD)
    assert user["roles"] == ["auditor", "operator"]
    assert "password_hash" not in user


def test_passwords_and_tokens_are_stored_hashed(lab):
    storage = lab.services.storage
    token = lab.tokens["olga"]
    with storage.read() as conn:
        row = conn.execute(select(st.users).where(st.users.c.username == "olga")).one()
        digests = conn.execute(select(st.api_tokens.c.token_sha256)).scalars().all()
    assert PASSWORD not in row.password_hash
    assert row.password_hash.startswith(("scrypt:", "pbkdf2:"))  # werkzeug's salted formats
    assert token not in digests
    assert sha256_hex(token.encode()) in digests


def test_unknown_or_disabled_token_is_refused(lab):
    client = lab.client()
    reply = client.get("/api/certificates", headers={"Authorization": "Bearer cct_forged"})
    assert reply.status_code == 401
    assert "unknown" in reply.get_json()["error"]
    assert client.get("/api/certificates", headers=lab.headers("olga")).status_code == 200
    update_user(lab.services.storage, "olga", active=False)
    assert client.get("/api/certificates", headers=lab.headers("olga")).status_code == 401


def test_anonymous_requests_are_refused(lab):
    client = lab.client()
    reply = client.get("/api/certificates")
    assert reply.status_code == 401 and "sign in" in reply.get_json()["error"]
    assert client.get("/certificates").status_code == 302  # to the sign-in page
    for path in ("/api/health", "/api/public-key", "/api/openapi.json", "/login"):
        assert client.get(path).status_code == 200, path


def test_password_login_with_csrf(lab):
    client = lab.client()
    # A form posted without the session's token (a cross-site request) is refused.
    client.get("/login")
    reply = client.post("/login", data={"username": "olga", "password": PASSWORD})
    assert reply.status_code == 400
    assert login(client, "olga", "wrong password!").status_code == 401
    reply = login(client, "olga")
    assert reply.status_code == 302 and reply.headers["Location"] == "/"
    page = client.get("/")
    assert page.status_code == 200 and b"Submit a run" in page.data
    # State changes from the browser need the token, even when signed in.
    assert client.post("/upload", data={}).status_code == 400
    assert client.post("/api/runs", data={}).status_code == 400  # cookie, no X-CSRF-Token
    token = _csrf(page.data)
    reply = client.post("/api/runs", data={}, headers={"X-CSRF-Token": token})
    assert reply.status_code == 400 and "no files" in reply.get_json()["error"]
    # Sign-out also needs the token; afterwards pages ask to sign in again.
    assert client.post("/logout").status_code == 400
    client.post("/logout", data={"csrf_token": token})
    assert client.get("/").status_code == 302


def test_login_redirect_stays_on_site(lab):
    client = lab.client()
    token = _csrf(client.get("/login").data)
    reply = client.post(
        "/login?next=//elsewhere.example/x",
        data={"username": "olga", "password": PASSWORD, "csrf_token": token},
    )
    assert reply.headers["Location"] == "/"


def test_api_tokens_need_no_csrf(lab):
    reply = lab.client().post("/api/runs", headers=lab.headers("olga"), data={})
    assert reply.status_code == 400 and "no files" in reply.get_json()["error"]


# Route → roles admitted. Every other role gets 403; nobody signed in gets 401.
ROLE_MATRIX = [
    ("POST", "/api/runs", {"operator"}),
    ("GET", "/api/runs/run-x", {"operator", "approver", "auditor"}),
    ("GET", "/api/jobs/job-x", {"operator", "approver", "auditor"}),
    ("GET", "/api/certificates", {"operator", "approver", "auditor"}),
    ("GET", "/api/certificates/CC-x", {"operator", "approver", "auditor"}),
    ("GET", "/api/certificates/CC-x/pdf", {"operator", "approver", "auditor"}),
    ("POST", "/api/certificates/CC-x/issue", {"approver"}),
    ("POST", "/api/certificates/CC-x/withdraw", {"approver"}),
    ("POST", "/api/certificates/CC-x/amend", {"operator"}),
    ("GET", "/api/certificates/CC-x/verify", {"auditor", "approver"}),
    ("POST", "/api/certificates/CC-x/reproduce", {"auditor", "approver"}),
    ("GET", "/api/archive/verify", {"auditor"}),
    ("GET", "/api/events", {"auditor", "admin"}),
    ("GET", "/api/users", {"admin"}),
    ("POST", "/api/users", {"admin"}),
    ("PATCH", "/api/users/olga", {"admin"}),
    ("POST", "/api/users/olga/tokens", {"admin"}),
]
SINGLE_ROLE = {"operator": "olga", "approver": "arno", "auditor": "aude", "admin": "adam"}


@pytest.mark.parametrize(("method", "path", "allowed"), ROLE_MATRIX)
def test_each_role_allowed_and_refused(shared_lab, method, path, allowed):
    lab = shared_lab
    client = lab.client()
    assert client.open(path, method=method).status_code == 401
    for role, person in SINGLE_ROLE.items():
        reply = client.open(path, method=method, headers=lab.headers(person), json={})
        if role in allowed:
            # Admitted: the request reaches the route (404 for the made-up ids, 400 for empty
            # bodies) but is never refused for its role.
            assert reply.status_code not in (401, 403), (role, reply.get_json())
        else:
            assert reply.status_code == 403, (role, reply.status_code)
            assert "needs the role" in reply.get_json()["error"]


@pytest.mark.parametrize(
    ("path", "allowed"),
    [
        ("/certificates", {"operator", "approver", "auditor"}),
        ("/audit", {"auditor", "admin"}),
        ("/users", {"admin"}),
    ],
)
def test_pages_check_roles(shared_lab, path, allowed):
    lab = shared_lab
    for role, person in SINGLE_ROLE.items():
        client = lab.client()
        login(client, person)
        status = client.get(path).status_code
        assert (status == 200) if role in allowed else (status == 403), (role, status)


def test_admin_manages_people_over_the_api(lab):
    client = lab.client()
    reply = client.post(
        "/api/users",
        headers=lab.headers("adam"),
        json={"username": "nina", "roles": "auditor", "password": PASSWORD},
    )
    assert reply.status_code == 201 and reply.get_json()["roles"] == ["auditor"]
    reply = client.post(
        "/api/users", headers=lab.headers("adam"), json={"username": "nina", "roles": "auditor"}
    )
    assert reply.status_code == 400 and "already exists" in reply.get_json()["error"]
    token = client.post(
        "/api/users/nina/tokens", headers=lab.headers("adam"), json={"label": "audit script"}
    ).get_json()["token"]
    headers = {"Authorization": f"Bearer {token}"}
    assert client.get("/api/archive/verify", headers=headers).status_code == 200
    client.patch("/api/users/nina", headers=lab.headers("adam"), json={"roles": "operator"})
    assert client.get("/api/archive/verify", headers=headers).status_code == 403
    events = client.get("/api/events", headers=lab.headers("adam")).get_json()["events"]
    assert {"user.created", "token.created", "user.updated"} <= {e["action"] for e in events}


def test_add_admin_command_creates_the_first_admin(tmp_path, monkeypatch, capsys):
    instance = tmp_path / "fresh"
    monkeypatch.setattr("sys.stdin", __import__("io").StringIO(PASSWORD + "\n"))
    assert cli_main(["add-admin", "root", "--instance", str(instance), "--password-stdin"]) == 0
    assert "created administrator root" in capsys.readouterr().out
    monkeypatch.setattr("sys.stdin", __import__("io").StringIO("short\n"))
    assert cli_main(["add-admin", "root2", "--instance", str(instance), "--password-stdin"]) == 2
    assert "at least 10" in capsys.readouterr().err
    assert cli_main(["new-token", "root", "--instance", str(instance)]) == 0
    token = capsys.readouterr().out.strip()
    from service.web.app import create_app

    app = create_app({"INSTANCE_PATH": str(instance)})
    reply = app.test_client().get("/api/users", headers={"Authorization": f"Bearer {token}"})
    assert reply.status_code == 200
    assert [u["username"] for u in reply.get_json()["users"]] == ["root"]
    assert create_token  # the CLI and the API share one token implementation


def test_people_page_changes_roles_disables_and_keeps_a_refused_form(lab):
    storage = lab.services.storage
    client = lab.client()
    login(client, "adam")
    csrf = _csrf(client.get("/users").data)

    def update(username, roles, active=True):
        data = {"csrf_token": csrf, "action": "update", "username": username, "roles": roles}
        if active:
            data["active"] = "on"
        return client.post("/users", data=data)

    # The first administrator can take the operator and approver roles from the page.
    assert update("adam", ["admin", "operator", "approver"]).status_code == 200
    assert get_user(storage, "adam")["roles"] == ["admin", "approver", "operator"]
    # An account is disabled from the page, and its token stops working at once.
    assert update("olga", ["operator"], active=False).status_code == 200
    assert not get_user(storage, "olga")["active"]
    assert lab.client().get("/api/certificates", headers=lab.headers("olga")).status_code in (401, 403)
    # The only active administrator cannot remove their own administration.
    refused = update("adam", ["operator"])
    assert refused.status_code == 400 and b"only active administrator" in refused.data
    assert "admin" in get_user(storage, "adam")["roles"]
    # A refused form comes back with what was typed, the field named.
    refused = client.post(
        "/users",
        data={
            "csrf_token": csrf, "action": "add", "username": "new-person",
            "display_name": "New Person", "password": "short", "roles": ["auditor"],
        },
    )
    assert refused.status_code == 400
    assert b"password: password must have at least" in refused.data
    assert b'value="new-person"' in refused.data and b'value="New Person"' in refused.data
    assert b'value="auditor" checked' in refused.data
    assert get_user(storage, "new-person") is None
