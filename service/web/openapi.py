"""OpenAPI 3.1 description of the JSON API, served at ``/api/openapi.json``.

Each operation lists the roles it admits under ``x-roles`` (empty: open to anyone). A test calls
every operation described here, so the document cannot drift from the routes. The operations
are one table (:data:`OPERATIONS`, grouped as the API is: service, runs and jobs, certificates,
archive and people, items and impact, the public check); the document is built from it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

_ERROR = {
    "description": "Refused; the body says why (and, for uploads, which file, line and field)",
    "content": {"application/json": {"schema": {"$ref": "#/components/schemas/Error"}}},
}
E = _ERROR


def _json(description: str, schema: dict | None = None) -> dict:
    return {
        "description": description,
        "content": {"application/json": {"schema": schema or {"type": "object"}}},
    }


def _plain(description: str) -> dict:
    """A response that is not JSON (a document, a PDF, a file)."""
    return {"description": description}


def _param(name: str, where: str = "path", description: str = "", **schema: Any) -> dict:
    return {
        "name": name,
        "in": where,
        "required": where == "path",
        "description": description,
        "schema": schema or {"type": "string"},
    }


def _query(name: str, description: str, **schema: Any) -> dict:
    return _param(name, "query", description, **schema)


def _body(properties: dict[str, Any], required: list[str]) -> dict[str, Any]:
    return {
        "content": {
            "application/json": {
                "schema": {"type": "object", "properties": properties, "required": required}
            }
        }
    }


def _strings(*names: str) -> dict[str, Any]:
    return {name: {"type": "string"} for name in names}


_CERT = _param("certificate_id", description="e.g. CC-2026-00001 or CC-2026-00001-R2")
_ITEM = _param("item", description="the item identifier as on its certificates, e.g. SMU-MXC-RX-14")
_SHA = _query("sha256", "SHA-256 of the file held (64 hex digits)")
_ID = _query("id", "certificate number as printed, e.g. CC-2026-00001")
_USER = _param("username")
READERS = ["operator", "approver", "auditor"]
AUDIT = ["auditor", "approver"]
ADMIN = ["admin"]
OPEN: list[str] = []


@dataclass(frozen=True)
class Operation:
    """One row of the table: a method on a path, who may call it and what it answers.

    ``responses`` maps a status to a description (a JSON object answer) or to a full response
    object (:data:`E` for a refusal, :func:`_plain` for a document that is not JSON)."""

    method: str
    path: str
    summary: str
    roles: list[str]
    responses: dict[str, str | dict]
    parameters: list[dict] = field(default_factory=list)
    body: dict | None = None

    def document(self) -> dict[str, Any]:
        responses = {
            status: _json(answer) if isinstance(answer, str) else answer
            for status, answer in self.responses.items()
        }
        op: dict[str, Any] = {"summary": self.summary, "x-roles": self.roles, "responses": responses}
        if self.roles:
            op["security"] = [{"token": []}, {"session": []}]
            op["responses"] = {**responses, "401": E, "403": E}
        if self.parameters:
            op["parameters"] = self.parameters
        if self.body is not None:
            op["requestBody"] = self.body
        return op


_UPLOAD = {
    "content": {
        "multipart/form-data": {
            "schema": {
                "type": "object",
                "properties": {
                    "files": {"type": "array", "items": {"type": "string", "format": "binary"}},
                    "archive": {"type": "string", "format": "binary"},
                    "seed": {"type": "integer"},
                    **_strings("replaces", "reason"),
                },
            }
        }
    }
}
_PUBLIC_CHECK = (
    "Public: is the file I hold an authentic certificate, and is it in force? Answers authentic "
    "or not and, if authentic, only the state, the replacing revision or the reason for "
    "withdrawal. Throttled per address (429)."
)

OPERATIONS: tuple[Operation, ...] = (
    # ---- the service ----
    Operation(
        "get", "/api/health",
        "Service is up; job counts by status, queue mode, messages waiting in the broker and "
        "the number of analysis workers seen",
        OPEN, {"200": "ok"},
    ),
    Operation("get", "/api/openapi.json", "This document", OPEN, {"200": "OpenAPI"}),
    Operation("get", "/api/public-key", "The lab's Ed25519 public key", OPEN, {"200": "key"}),
    # ---- runs and jobs ----
    Operation(
        "post", "/api/runs",
        "Upload a run (files, or one zip/tar of the run folder); queues its analysis",
        ["operator"], {"202": "accepted; job queued", "400": E, "413": E}, body=_UPLOAD,
    ),
    Operation(
        "get", "/api/runs/{run_id}", "A run: its files, manifest and jobs", READERS,
        {"200": "run", "404": E}, [_param("run_id")],
    ),
    Operation(
        "get", "/api/jobs/{job_id}", "A job's status and progress", READERS,
        {"200": _json("job", {"$ref": "#/components/schemas/Job"}), "404": E},
        [_param("job_id")],
    ),
    Operation(
        "post", "/api/jobs/{job_id}/retry",
        "Queue a failed job again (at most twice; each retry is logged)",
        ["operator", "approver"], {"202": "queued again", "404": E, "409": E}, [_param("job_id")],
    ),
    # ---- certificates ----
    Operation(
        "get", "/api/certificates", "Search the archive", READERS, {"200": "matches", "400": E},
        [
            _query("item", "part of the item description"),
            _query("kind", "job kind, e.g. cbt_thermometry"),
            _query("state", "draft, issued, superseded or withdrawn"),
            _query("from", "earliest date, YYYY-MM-DD"),
            _query("to", "latest date, YYYY-MM-DD"),
            _query("q", "text in id or item"),
            _query("limit", "at most this many", type="integer"),
        ],
    ),
    Operation(
        "get", "/api/certificates/{certificate_id}", "A certificate: state, record, files",
        READERS, {"200": "certificate", "404": E}, [_CERT],
    ),
    Operation(
        "get", "/api/certificates/{certificate_id}/{fmt}",
        "A rendering: json (record), signed (entry with signature), html, pdf, xml "
        "(DCC 3.3.0; issued certificates only)",
        READERS, {"200": _plain("the document"), "404": E, "409": E},
        [
            _CERT,
            {
                **_param("fmt", "path", "format"),
                "schema": {"enum": ["json", "signed", "html", "pdf", "xml"]},
            },
        ],
    ),
    Operation(
        "get", "/api/certificates/{certificate_id}/files/{name}",
        "An output file of the analysis kept with the certificate "
        "(e.g. calibration_table.csv); names listed in the certificate's extra_files",
        READERS, {"200": _plain("the file"), "404": E}, [_CERT, _param("name")],
    ),
    Operation(
        "post", "/api/certificates/{certificate_id}/issue",
        "Issue a draft (an approver who did not submit it)",
        ["approver"], {"200": "issued: sequence and SHA-256", "409": E}, [_CERT],
    ),
    Operation(
        "post", "/api/certificates/{certificate_id}/withdraw",
        "Withdraw an issued certificate or discard a draft",
        ["approver"], {"200": "withdrawn", "400": E, "409": E}, [_CERT],
        _body(_strings("reason"), ["reason"]),
    ),
    Operation(
        "post", "/api/certificates/{certificate_id}/amend",
        "Draft a new revision correcting administrative fields (ISO/IEC 17025 7.8.8)",
        ["operator"], {"201": "new draft", "400": E, "409": E}, [_CERT],
        _body({**_strings("reason"), "corrections": {"type": "object"}}, ["reason"]),
    ),
    Operation(
        "post", "/api/certificates/{certificate_id}/corrections",
        "Fill or correct administrative fields of a draft before issue; answers what it still "
        "lacks (ISO/IEC 17025 7.8.2.1)",
        ["operator"], {"200": "what the draft still lacks", "400": E, "409": E}, [_CERT],
        _body({"corrections": {"type": "object"}}, ["corrections"]),
    ),
    Operation(
        "get", "/api/certificates/{certificate_id}/verify", "Check signature, chain and raw files",
        AUDIT, {"200": "verification report"}, [_CERT],
    ),
    Operation(
        "post", "/api/certificates/{certificate_id}/reproduce",
        "Re-run the archived analysis in the background and compare every number",
        AUDIT, {"202": "job queued"}, [_CERT],
    ),
    # ---- the archive and people ----
    Operation("get", "/api/archive/verify", "Verify the whole chain", ["auditor"], {"200": "report"}),
    Operation(
        "get", "/api/events", "The event log, newest first", ["auditor", "admin"],
        {"200": "events"}, [_query("subject", "only events about this id")],
    ),
    Operation("get", "/api/users", "People and roles", ADMIN, {"200": "users"}),
    Operation(
        "post", "/api/users", "Add a person", ADMIN, {"201": "user", "400": E},
        body=_body(_strings("username", "roles", "password", "display_name"), ["username", "roles"]),
    ),
    Operation(
        "patch", "/api/users/{username}", "Change roles, password or disable", ADMIN,
        {"200": "user", "400": E}, [_USER],
        _body(
            {"roles": {"type": "string"}, "active": {"type": "boolean"}, **_strings("password")},
            [],
        ),
    ),
    Operation(
        "get", "/api/users/{username}/tokens",
        "List a person's API tokens (id, label, made, revoked; never the token)",
        ADMIN, {"200": "tokens", "400": E}, [_USER],
    ),
    Operation(
        "post", "/api/users/{username}/tokens",
        "Make an API token (shown once; the id is for listing and revoking)",
        ADMIN, {"201": "token and token_id", "400": E}, [_USER], _body(_strings("label"), []),
    ),
    Operation(
        "post", "/api/users/{username}/tokens/{token_id}/revoke",
        "Revoke one API token; it stops working at once",
        ADMIN, {"200": "revoked token", "404": E, "409": E},
        [_USER, _param("token_id", type="integer")],
    ),
    # ---- items, impact of a change (docs/history.md) ----
    Operation(
        "get", "/api/items/{item}/history",
        "Every certificate of an item in time order, the drift of its tracked quantities, ΔT(R) "
        "between sensor curves, and its due date",
        READERS, {"200": "history", "404": E}, [_ITEM],
    ),
    Operation(
        "get", "/api/items/{item}/history.pdf", "The item's history report as PDF", READERS,
        {"200": _plain("PDF"), "404": E}, [_ITEM],
    ),
    Operation(
        "get", "/api/items/due",
        "Items with a certificate in force: due date and status, soonest first",
        READERS, {"200": "items", "400": E}, [_query("status", "overdue, due or in date")],
    ),
    Operation(
        "get", "/api/impact",
        "Issued certificates that used a software version or model, or were issued in a date "
        "range (none given: all issued), with item and customer",
        AUDIT, {"200": "certificates", "400": E},
        [
            _query("software", "coldcert version, or NAME=VERSION"),
            _query("model", "part of a model name"),
            _query("from", "issued on or after (YYYY-MM-DD)"),
            _query("to", "issued on or before (YYYY-MM-DD)"),
            _query("in_force", "1: only certificates in force"),
        ],
    ),
    Operation(
        "post", "/api/impact/reproduce", "Reproduce certificates in bulk through the job queue",
        AUDIT, {"202": "jobs and the report address", "400": E, "409": E},
        body=_body(
            {
                "certificate_ids": {"type": "array", "items": {"type": "string"}},
                "fraction": {"type": "number"},
            },
            ["certificate_ids"],
        ),
    ),
    Operation(
        "get", "/api/impact/reproduce",
        "Report of a bulk reproduction: results that moved by more than a fraction of their "
        "expanded uncertainty",
        AUDIT, {"200": "report", "400": E},
        [
            _query("jobs", "job ids, comma-separated"),
            _query("fraction", "flag moves above this multiple of U (0.1)"),
        ],
    ),
    # ---- the customer's public check ----
    Operation(
        "get", "/api/public/check", _PUBLIC_CHECK, OPEN,
        {"200": "answer", "400": E, "429": E}, [_ID, _SHA],
    ),
    Operation(
        "post", "/api/public/check",
        _PUBLIC_CHECK + " (the file as multipart field 'file', hashed as it arrives and not "
        "stored)",
        OPEN, {"200": "answer", "400": E, "429": E}, [_ID],
    ),
)


def openapi_document() -> dict[str, Any]:
    """The whole document: header, shared schemas and one entry per row of OPERATIONS."""
    paths: dict[str, dict[str, Any]] = {}
    for operation in OPERATIONS:
        paths.setdefault(operation.path, {})[operation.method] = operation.document()
    return {"openapi": "3.1.0", "info": _info(), "components": _components(), "paths": paths}


def _info() -> dict[str, Any]:
    return {
        "title": "coldcert calibration service",
        "version": "1",
        "description": (
            "Upload measurement runs, follow their analysis, issue signed certificates and "
            "audit the archive. Authenticate with 'Authorization: Bearer <token>'."
        ),
    }


def _components() -> dict[str, Any]:
    nullable_string = {"type": ["string", "null"]}
    return {
        "securitySchemes": {
            "token": {"type": "http", "scheme": "bearer"},
            "session": {"type": "apiKey", "in": "cookie", "name": "session"},
        },
        "schemas": {
            "Error": {
                "type": "object",
                "required": ["error"],
                "properties": {
                    "error": {"type": "string"},
                    "file": nullable_string,
                    "line": {"type": ["integer", "null"]},
                    "field": nullable_string,
                },
            },
            "Job": {
                "type": "object",
                "properties": {
                    "id": {"type": "string"},
                    "purpose": {"enum": ["certify", "reproduce"]},
                    "status": {"enum": ["queued", "running", "done", "failed"]},
                    "fraction": {"type": "number"},
                    "step": {"type": "string"},
                    "error": nullable_string,
                    "certificate_id": nullable_string,
                    "result": {},
                },
            },
        },
    }
