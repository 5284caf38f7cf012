"""People, roles, API tokens, password login with CSRF protection, and the role check.

Roles separate the duties a calibration laboratory keeps apart (ISO/IEC 17025:2017 6.2.6):

* ``operator`` submits measurement runs and prepares amendments,
* ``approver`` reviews drafts and issues or withdraws certificates,
* ``auditor`` reads the archive, verifies and reproduces certificates, reads the event log,
* ``admin`` manages people and their tokens.

A person may hold several roles; the four-eyes rule (approver ≠ submitter) is enforced on the
certificate itself, not by roles. Scripts authenticate with API tokens (``Authorization: Bearer
…``); only the SHA-256 of a token is stored, which is enough for a random 256-bit secret (common
practice, no source). People authenticate in the browser with a password (salted, iterated hash
from werkzeug.security) and a session cookie; every state-changing request from a browser
session must carry the session's CSRF token.
"""

from __future__ import annotations

import functools
import hmac
import re
import secrets
from collections.abc import Callable, Iterable, Mapping
from datetime import UTC, datetime, timedelta
from typing import Any

from flask import (
    Blueprint,
    abort,
    current_app,
    flash,
    g,
    jsonify,
    redirect,
    render_template,
    request,
    session,
    url_for,
)
from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from werkzeug.security import check_password_hash, generate_password_hash

from service import storage as st
from service.archive import log_event
from service.storage import Storage, sha256_hex, utc_now

ROLES = ("operator", "approver", "auditor", "admin")
TOKEN_PREFIX = "cct_"
_USERNAME = re.compile(r"^[A-Za-z0-9._-]{2,80}$")
MIN_PASSWORD_LENGTH = 10

bp = Blueprint("auth", __name__)


class AuthError(Exception):
    """A refused account operation with a message for the person making it.

    ``field`` names the form field or request key at fault, when there is one.
    """

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message)
        self.field = field


# --------------------------------------------------------------------------------------------
# Accounts


def _parse_roles(roles: str | Iterable[str]) -> list[str]:
    items = roles.split(",") if isinstance(roles, str) else list(roles)
    cleaned = sorted({r.strip() for r in items if r.strip()})
    unknown = [r for r in cleaned if r not in ROLES]
    if not cleaned or unknown:
        raise AuthError(
            f"roles must be a non-empty subset of {', '.join(ROLES)}; got {', '.join(items) or '∅'}",
            field="roles",
        )
    return cleaned


def _public(row) -> dict[str, Any]:
    user = dict(row._mapping)
    user.pop("password_hash", None)
    user["roles"] = user["roles"].split(",")
    return user


def create_user(
    storage: Storage,
    username: str,
    roles: str | Iterable[str],
    password: str | None = None,
    display_name: str = "",
    actor: str = "system",
) -> dict[str, Any]:
    if not _USERNAME.match(username or ""):
        raise AuthError(
            f"username {username!r} must be 2-80 characters of letters, digits, '.', '_' or '-'",
            field="username",
        )
    role_list = _parse_roles(roles)
    if password is not None and len(password) < MIN_PASSWORD_LENGTH:
        raise AuthError(
            f"password must have at least {MIN_PASSWORD_LENGTH} characters", field="password"
        )
    try:
        with storage.write() as conn:
            uid = conn.execute(
                st.users.insert().values(
                    username=username,
                    display_name=display_name or username,
                    password_hash=generate_password_hash(password) if password else None,
                    roles=",".join(role_list),
                    active=True,
                    created_at=utc_now(),
                )
            ).inserted_primary_key[0]
            log_event(conn, actor, "user.created", username, {"roles": role_list})
            row = conn.execute(select(st.users).where(st.users.c.id == uid)).one()
    except IntegrityError:
        raise AuthError(f"a user named {username!r} already exists", field="username") from None
    return _public(row)


def get_user(storage: Storage, username: str) -> dict[str, Any] | None:
    with storage.read() as conn:
        row = conn.execute(select(st.users).where(st.users.c.username == username)).first()
    return _public(row) if row is not None else None


def list_users(storage: Storage) -> list[dict[str, Any]]:
    with storage.read() as conn:
        rows = conn.execute(select(st.users).order_by(st.users.c.username)).all()
    return [_public(r) for r in rows]


def update_user(
    storage: Storage,
    username: str,
    *,
    roles: str | Iterable[str] | None = None,
    active: bool | None = None,
    password: str | None = None,
    actor: str = "system",
) -> dict[str, Any]:
    values: dict[str, Any] = {}
    if roles is not None:
        values["roles"] = ",".join(_parse_roles(roles))
    if active is not None:
        values["active"] = bool(active)
    if password is not None:
        if len(password) < MIN_PASSWORD_LENGTH:
            raise AuthError(f"password must have at least {MIN_PASSWORD_LENGTH} characters")
        values["password_hash"] = generate_password_hash(password)
    if not values:
        raise AuthError("nothing to change: give roles, active or password")
    with storage.write() as conn:
        _keep_an_administrator(conn, username, values)
        result = conn.execute(
            st.users.update().where(st.users.c.username == username).values(**values)
        )
        if result.rowcount == 0:
            raise AuthError(f"no user named {username!r}")
        detail = {k: v for k, v in values.items() if k != "password_hash"}
        if "password_hash" in values:
            detail["password"] = "changed"
        log_event(conn, actor, "user.updated", username, detail)
        row = conn.execute(select(st.users).where(st.users.c.username == username)).one()
    return _public(row)


def _keep_an_administrator(conn, username: str, values: Mapping[str, Any]) -> None:
    """Refuse a change that would leave the archive with no active administrator."""
    loses_admin = ("roles" in values and "admin" not in values["roles"].split(",")) or (
        values.get("active") is False
    )
    if not loses_admin:
        return
    admins = [
        r.username
        for r in conn.execute(select(st.users.c.username, st.users.c.roles, st.users.c.active))
        if r.active and "admin" in r.roles.split(",")
    ]
    if admins == [username]:
        raise AuthError(
            f"{username} is the only active administrator; make someone else an administrator "
            "first",
            field="active" if values.get("active") is False else "roles",
        )


def check_password(storage: Storage, username: str, password: str) -> dict[str, Any] | None:
    with storage.read() as conn:
        row = conn.execute(select(st.users).where(st.users.c.username == username)).first()
    if row is None or not row.active or not row.password_hash:
        # Spend the same time as a real check so timing does not reveal which names exist.
        check_password_hash(_DUMMY_HASH, password or "")
        return None
    if not check_password_hash(row.password_hash, password or ""):
        return None
    return _public(row)


_DUMMY_HASH = generate_password_hash("not-a-real-password")


def create_token(storage: Storage, username: str, label: str = "", actor: str = "system") -> str:
    """Make an API token for ``username``; the token is returned once and stored only hashed."""
    return create_token_entry(storage, username, label, actor)[1]


def create_token_entry(
    storage: Storage, username: str, label: str = "", actor: str = "system"
) -> tuple[int, str]:
    """Like :func:`create_token`, also returning the token's id (to list or revoke it later)."""
    token = TOKEN_PREFIX + secrets.token_urlsafe(32)
    with storage.write() as conn:
        row = conn.execute(select(st.users).where(st.users.c.username == username)).first()
        if row is None:
            raise AuthError(f"no user named {username!r}")
        token_id = conn.execute(
            st.api_tokens.insert().values(
                user_id=row.id,
                token_sha256=sha256_hex(token.encode()),
                label=label,
                created_at=utc_now(),
            )
        ).inserted_primary_key[0]
        log_event(conn, actor, "token.created", username, {"label": label, "token_id": token_id})
    return token_id, token


def list_tokens(storage: Storage, username: str) -> list[dict[str, Any]]:
    """A person's API tokens: id, label, when made and when revoked (never the hash)."""
    t = st.api_tokens.c
    with storage.read() as conn:
        user = conn.execute(select(st.users.c.id).where(st.users.c.username == username)).first()
        if user is None:
            raise AuthError(f"no user named {username!r}")
        rows = conn.execute(
            select(t.id, t.label, t.created_at, t.revoked_at)
            .where(t.user_id == user.id)
            .order_by(t.id)
        ).all()
    return [dict(r._mapping) for r in rows]


class TokenNotFound(AuthError):
    """No such token for that person (HTTP 404)."""


class TokenAlreadyRevoked(AuthError):
    """The token was revoked before (HTTP 409)."""


def revoke_token(storage: Storage, username: str, token_id: int, actor: str = "system") -> dict:
    """Revoke one API token of ``username``; it stops working at once. Kept for the record."""
    t = st.api_tokens.c
    with storage.write() as conn:
        row = conn.execute(
            select(t.id, t.label, t.created_at, t.revoked_at)
            .join(st.users, st.users.c.id == t.user_id)
            .where(st.users.c.username == username)
            .where(t.id == token_id)
        ).first()
        if row is None:
            raise TokenNotFound(f"{username} has no API token {token_id}")
        if row.revoked_at is not None:
            raise TokenAlreadyRevoked(f"API token {token_id} of {username} was revoked at {row.revoked_at}")
        now = utc_now()
        conn.execute(st.api_tokens.update().where(t.id == token_id).values(revoked_at=now))
        log_event(conn, actor, "token.revoked", username, {"token_id": token_id, "label": row.label})
    return {"id": token_id, "label": row.label, "created_at": row.created_at, "revoked_at": now}


def user_for_token(storage: Storage, token: str) -> dict[str, Any] | None:
    digest = sha256_hex(token.encode())
    with storage.read() as conn:
        row = conn.execute(
            select(st.users)
            .join(st.api_tokens, st.api_tokens.c.user_id == st.users.c.id)
            .where(st.api_tokens.c.token_sha256 == digest)
            .where(st.api_tokens.c.revoked_at.is_(None))
        ).first()
    if row is None or not row.active:
        return None
    return _public(row)


# --------------------------------------------------------------------------------------------
# Request handling


def _storage() -> Storage:
    return current_app.extensions["coldcert"].storage


def is_api_request() -> bool:
    return request.path.startswith("/api/")


def csrf_token() -> str:
    token = session.get("csrf_token")
    if not token:
        token = secrets.token_urlsafe(32)
        session["csrf_token"] = token
    return token


@bp.before_app_request
def load_user() -> None:
    g.user = None
    g.via_token = False
    header = request.headers.get("Authorization", "")
    if header.startswith("Bearer "):
        user = user_for_token(_storage(), header[7:].strip())
        if user is None:
            return _deny(401, "the API token is unknown, revoked or belongs to a disabled user")
        g.user, g.via_token = user, True
        return None
    uid = session.get("user_id")
    if uid is not None:
        with _storage().read() as conn:
            row = conn.execute(select(st.users).where(st.users.c.id == uid)).first()
        # A password change (or reset) ends every session signed in with the old password.
        if (
            row is not None
            and row.active
            and hmac.compare_digest(session.get("password_epoch", ""), _password_epoch(row))
        ):
            g.user = _public(row)
        else:
            session.clear()
    # Browser sessions must prove each state change came from our own page (CSRF).
    # Anonymous requests are refused by the role check anyway, except the sign-in form, which is
    # protected too so that another site cannot sign a browser into an account of its choosing.
    changing = request.method in ("POST", "PUT", "PATCH", "DELETE")
    if changing and (g.user is not None or request.endpoint == "auth.login"):
        sent = request.headers.get("X-CSRF-Token") or request.form.get("csrf_token", "")
        expected = session.get("csrf_token", "")
        if not expected or not hmac.compare_digest(sent, expected):
            return _deny(400, "the form's security token is missing or expired; reload the page")
    return None


def _password_epoch(row) -> str:
    """A short digest of the stored password hash: changes whenever the password does."""
    return sha256_hex(("session:" + (row.password_hash or "")).encode())[:32]


def _deny(status: int, message: str):
    if is_api_request() or g.get("via_token"):
        response = jsonify(error=message)
        response.status_code = status
        if status == 401:
            response.headers["WWW-Authenticate"] = 'Bearer realm="coldcert"'
        return response
    if status == 401:
        return redirect(url_for("auth.login", next=request.full_path))
    abort(status, description=message)
    return None  # pragma: no cover


def roles_required(*roles: str) -> Callable:
    """Let the request through only for a signed-in person holding one of ``roles``."""
    unknown = [r for r in roles if r not in ROLES]
    if unknown:
        raise ValueError(f"unknown roles {unknown}")

    def decorator(view: Callable) -> Callable:
        @functools.wraps(view)
        def wrapped(*args, **kwargs):
            user = g.get("user")
            if user is None:
                return _deny(401, "sign in or send an API token (Authorization: Bearer …)")
            if not set(user["roles"]) & set(roles):
                return _deny(
                    403,
                    f"this needs the role {' or '.join(roles)}; "
                    f"{user['username']} has {', '.join(user['roles'])}",
                )
            return view(*args, **kwargs)

        wrapped.required_roles = roles  # read by the OpenAPI test and the docs
        return wrapped

    return decorator


def has_role(*roles: str) -> bool:
    user = g.get("user")
    return bool(user and set(user["roles"]) & set(roles))


@bp.app_context_processor
def _template_helpers() -> Mapping[str, Any]:
    return {"csrf_token": csrf_token, "has_role": has_role}


def _log_sign_in(actor: str, action: str, subject: str) -> None:
    # A read-only audit copy cannot record sign-ins (nor count failures, which then never wait).
    if _storage().read_only:
        return
    with _storage().write() as conn:
        log_event(conn, actor, action, subject)


@bp.route("/login", methods=["GET", "POST"])
def login():
    if request.method == "POST":
        username = request.form.get("username", "").strip()[:80]
        wait = _login_wait(username)
        if wait:
            _log_sign_in(username or "?", "login.throttled", username)
            flash(
                f"Too many failed sign-ins for this name; try again in {wait // 60 + 1} minutes.",
                "error",
            )
            return render_template("login.html"), 429, {"Retry-After": str(wait)}
        user = check_password(_storage(), username, request.form.get("password", ""))
        if user is None:
            flash("Unknown user name or wrong password.", "error")
            _log_sign_in(username or "?", "login.failed", username)
            return render_template("login.html"), 401
        session.clear()
        session["user_id"] = user["id"]
        with _storage().read() as conn:
            row = conn.execute(select(st.users).where(st.users.c.id == user["id"])).one()
        session["password_epoch"] = _password_epoch(row)
        csrf_token()
        _log_sign_in(user["username"], "login", user["username"])
        target = request.args.get("next", "")
        # Only same-site paths, never another host.
        if not target.startswith("/") or target.startswith("//"):
            target = url_for("pages.home")
        return redirect(target)
    return render_template("login.html")


#: Failed sign-ins for one name within the window before further attempts wait (common
#: practice, no source; cf. the rate limiting NIST SP 800-63B 5.2.2 asks of verifiers).
LOGIN_FAILURES_ALLOWED = 5
LOGIN_WINDOW_SECONDS = 15 * 60


def _login_wait(username: str) -> int:
    """Seconds until ``username`` may try again (0 = now), from the event log's failures."""
    since = (datetime.now(UTC) - timedelta(seconds=LOGIN_WINDOW_SECONDS)).strftime(
        "%Y-%m-%dT%H:%M:%S.%fZ"
    )
    e = st.events.c
    with _storage().read() as conn:
        failures = conn.execute(
            select(e.at)
            .where(e.action == "login.failed")
            .where(e.subject == username)
            .where(e.at >= since)
            .order_by(e.at.desc())
            .limit(LOGIN_FAILURES_ALLOWED)
        ).all()
    if len(failures) < LOGIN_FAILURES_ALLOWED:
        return 0
    oldest = datetime.strptime(failures[-1].at, "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=UTC)
    left = LOGIN_WINDOW_SECONDS - (datetime.now(UTC) - oldest).total_seconds()
    return max(1, int(left))


@bp.route("/logout", methods=["POST"])
def logout():
    session.clear()
    return redirect(url_for("auth.login"))
