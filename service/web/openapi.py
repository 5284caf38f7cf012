"""OpenAPI 3.1 description of the JSON API, served at ``/api/openapi.json``.

Each operation lists the roles it admits under ``x-roles`` (empty: open to anyone). A test calls
every operation described here, so the document cannot drift from the routes.
"""

from __future__ import annotations

from typing import Any

_ERROR = {
    "description": "Refused; the body says why (and, for uploads, which file, line and field)",
    "content": {"application/json": {"schema": {"$ref": "#/components/schemas/Error"}}},
}


def _op(summary: str, roles: list[str], responses: dict[str, Any], **extra: Any) -> dict:
    op: dict[str, Any] = {"summary": summary, "x-roles": roles, "responses": responses}
    if roles:
        op["security"] = [{"token": []}, {"session": []}]
        op["responses"] = {**responses, "401": _ERROR, "403": _ERROR}
    op.update(extra)
    return op


def _json(description: str, schema: dict | None = None) -> dict:
    return {
        "description": description,
        "content": {"application/json": {"schema": schema or {"type": "object"}}},
    }


def _param(name: str, where: str = "path", description: str = "", **schema: Any) -> dict:
    return {
        "name": name,
        "in": where,
        "required": where == "path",
        "description": description,
        "schema": schema or {"type": "string"},
    }


_CERT = _param("certificate_id", description="e.g. CC-2026-00001 or CC-2026-00001-R2")
READERS = ["operator", "approver", "auditor"]
AUDIT = ["auditor", "approver"]


def openapi_document() -> dict[str, Any]:
    return {
        "openapi": "3.1.0",
        "info": {
            "title": "coldcert calibration service",
            "version": "1",
            "description": (
                "Upload measurement runs, follow their analysis, issue signed certificates and "
                "audit the archive. Authenticate with 'Authorization: Bearer <token>'."
            ),
        },
        "components": {
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
                        "file": {"type": ["string", "null"]},
                        "line": {"type": ["integer", "null"]},
                        "field": {"type": ["string", "null"]},
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
                        "error": {"type": ["string", "null"]},
                        "certificate_id": {"type": ["string", "null"]},
                        "result": {},
                    },
                },
            },
        },
        "paths": {
            "/api/health": {
                "get": _op(
                    "Service is up; job counts by status, queue mode, messages waiting in the "
                    "broker and the number of analysis workers seen",
                    [],
                    {"200": _json("ok")},
                )
            },
            "/api/openapi.json": {"get": _op("This document", [], {"200": _json("OpenAPI")})},
            "/api/public-key": {
                "get": _op("The lab's Ed25519 public key", [], {"200": _json("key")})
            },
            "/api/runs": {
                "post": _op(
                    "Upload a run (files, or one zip/tar of the run folder); queues its analysis",
                    ["operator"],
                    {"202": _json("accepted; job queued"), "400": _ERROR, "413": _ERROR},
                    requestBody={
                        "content": {
                            "multipart/form-data": {
                                "schema": {
                                    "type": "object",
                                    "properties": {
                                        "files": {
                                            "type": "array",
                                            "items": {"type": "string", "format": "binary"},
                                        },
                                        "archive": {"type": "string", "format": "binary"},
                                        "seed": {"type": "integer"},
                                        "replaces": {"type": "string"},
                                        "reason": {"type": "string"},
                                    },
                                }
                            }
                        }
                    },
                )
            },
            "/api/runs/{run_id}": {
                "get": _op(
                    "A run: its files, manifest and jobs",
                    READERS,
                    {"200": _json("run"), "404": _ERROR},
                    parameters=[_param("run_id")],
                )
            },
            "/api/jobs/{job_id}": {
                "get": _op(
                    "A job's status and progress",
                    READERS,
                    {"200": _json("job", {"$ref": "#/components/schemas/Job"}), "404": _ERROR},
                    parameters=[_param("job_id")],
                )
            },
            "/api/jobs/{job_id}/retry": {
                "post": _op(
                    "Queue a failed job again (at most twice; each retry is logged)",
                    ["operator", "approver"],
                    {"202": _json("queued again"), "404": _ERROR, "409": _ERROR},
                    parameters=[_param("job_id")],
                )
            },
            "/api/certificates": {
                "get": _op(
                    "Search the archive",
                    READERS,
                    {"200": _json("matches"), "400": _ERROR},
                    parameters=[
                        _param("item", "query", "part of the item description"),
                        _param("kind", "query", "job kind, e.g. cbt_thermometry"),
                        _param("state", "query", "draft, issued, superseded or withdrawn"),
                        _param("from", "query", "earliest date, YYYY-MM-DD"),
                        _param("to", "query", "latest date, YYYY-MM-DD"),
                        _param("q", "query", "text in id or item"),
                        _param("limit", "query", "at most this many", type="integer"),
                    ],
                )
            },
            "/api/certificates/{certificate_id}": {
                "get": _op(
                    "A certificate: state, record, files",
                    READERS,
                    {"200": _json("certificate"), "404": _ERROR},
                    parameters=[_CERT],
                )
            },
            "/api/certificates/{certificate_id}/{fmt}": {
                "get": _op(
                    "A rendering: json (record), signed (entry with signature), html, pdf, xml "
                    "(DCC 3.3.0; issued certificates only)",
                    READERS,
                    {
                        "200": {"description": "the document"},
                        "404": _ERROR,
                        "409": _ERROR,
                    },
                    parameters=[
                        _CERT,
                        {
                            **_param("fmt", "path", "format"),
                            "schema": {"enum": ["json", "signed", "html", "pdf", "xml"]},
                        },
                    ],
                )
            },
            "/api/certificates/{certificate_id}/files/{name}": {
                "get": _op(
                    "An output file of the analysis kept with the certificate "
                    "(e.g. calibration_table.csv); names listed in the certificate's extra_files",
                    READERS,
                    {"200": {"description": "the file"}, "404": _ERROR},
                    parameters=[_CERT, _param("name")],
                )
            },
            "/api/certificates/{certificate_id}/issue": {
                "post": _op(
                    "Issue a draft (an approver who did not submit it)",
                    ["approver"],
                    {"200": _json("issued: sequence and SHA-256"), "409": _ERROR},
                    parameters=[_CERT],
                )
            },
            "/api/certificates/{certificate_id}/withdraw": {
                "post": _op(
                    "Withdraw an issued certificate or discard a draft",
                    ["approver"],
                    {"200": _json("withdrawn"), "400": _ERROR, "409": _ERROR},
                    parameters=[_CERT],
                    requestBody=_body({"reason": {"type": "string"}}, ["reason"]),
                )
            },
            "/api/certificates/{certificate_id}/amend": {
                "post": _op(
                    "Draft a new revision correcting administrative fields (ISO/IEC 17025 7.8.8)",
                    ["operator"],
                    {"201": _json("new draft"), "400": _ERROR, "409": _ERROR},
                    parameters=[_CERT],
                    requestBody=_body(
                        {"reason": {"type": "string"}, "corrections": {"type": "object"}},
                        ["reason"],
                    ),
                )
            },
            "/api/certificates/{certificate_id}/corrections": {
                "post": _op(
                    "Fill or correct administrative fields of a draft before issue; answers "
                    "what it still lacks (ISO/IEC 17025 7.8.2.1)",
                    ["operator"],
                    {"200": _json("what the draft still lacks"), "400": _ERROR, "409": _ERROR},
                    parameters=[_CERT],
                    requestBody=_body({"corrections": {"type": "object"}}, ["corrections"]),
                )
            },
            "/api/certificates/{certificate_id}/verify": {
                "get": _op(
                    "Check signature, chain and raw files",
                    AUDIT,
                    {"200": _json("verification report")},
                    parameters=[_CERT],
                )
            },
            "/api/certificates/{certificate_id}/reproduce": {
                "post": _op(
                    "Re-run the archived analysis in the background and compare every number",
                    AUDIT,
                    {"202": _json("job queued")},
                    parameters=[_CERT],
                )
            },
            "/api/archive/verify": {
                "get": _op("Verify the whole chain", ["auditor"], {"200": _json("report")})
            },
            "/api/events": {
                "get": _op(
                    "The event log, newest first",
                    ["auditor", "admin"],
                    {"200": _json("events")},
                    parameters=[_param("subject", "query", "only events about this id")],
                )
            },
            "/api/users": {
                "get": _op("People and roles", ["admin"], {"200": _json("users")}),
                "post": _op(
                    "Add a person",
                    ["admin"],
                    {"201": _json("user"), "400": _ERROR},
                    requestBody=_body(
                        {
                            "username": {"type": "string"},
                            "roles": {"type": "string"},
                            "password": {"type": "string"},
                            "display_name": {"type": "string"},
                        },
                        ["username", "roles"],
                    ),
                ),
            },
            "/api/users/{username}": {
                "patch": _op(
                    "Change roles, password or disable",
                    ["admin"],
                    {"200": _json("user"), "400": _ERROR},
                    parameters=[_param("username")],
                    requestBody=_body(
                        {
                            "roles": {"type": "string"},
                            "active": {"type": "boolean"},
                            "password": {"type": "string"},
                        },
                        [],
                    ),
                )
            },
            "/api/users/{username}/tokens": {
                "get": _op(
                    "List a person's API tokens (id, label, made, revoked; never the token)",
                    ["admin"],
                    {"200": _json("tokens"), "400": _ERROR},
                    parameters=[_param("username")],
                ),
                "post": _op(
                    "Make an API token (shown once; the id is for listing and revoking)",
                    ["admin"],
                    {"201": _json("token and token_id"), "400": _ERROR},
                    parameters=[_param("username")],
                    requestBody=_body({"label": {"type": "string"}}, []),
                ),
            },
            "/api/users/{username}/tokens/{token_id}/revoke": {
                "post": _op(
                    "Revoke one API token; it stops working at once",
                    ["admin"],
                    {"200": _json("revoked token"), "404": _ERROR, "409": _ERROR},
                    parameters=[_param("username"), _param("token_id", type="integer")],
                )
            },
            **_history_paths(),
        },
    }


def _body(properties: dict[str, Any], required: list[str]) -> dict[str, Any]:
    return {
        "content": {
            "application/json": {
                "schema": {"type": "object", "properties": properties, "required": required}
            }
        }
    }


_ITEM = _param("item", description="the item identifier as on its certificates, e.g. SMU-MXC-RX-14")
_SHA = _param("sha256", "query", "SHA-256 of the file held (64 hex digits)")
_ID = _param("id", "query", "certificate number as printed, e.g. CC-2026-00001")


def _history_paths() -> dict[str, Any]:
    """Items, impact of a change and the public check (docs/history.md)."""
    check = {
        "summary": "Public: is the file I hold an authentic certificate, and is it in force? "
        "Answers authentic or not and, if authentic, only the state, the replacing revision "
        "or the reason for withdrawal. Throttled per address (429).",
        "x-roles": [],
        "responses": {"200": _json("answer"), "400": _ERROR, "429": _ERROR},
    }
    return {
        "/api/items/{item}/history": {
            "get": _op(
                "Every certificate of an item in time order, the drift of its tracked "
                "quantities, ΔT(R) between sensor curves, and its due date",
                READERS,
                {"200": _json("history"), "404": _ERROR},
                parameters=[_ITEM],
            )
        },
        "/api/items/{item}/history.pdf": {
            "get": _op(
                "The item's history report as PDF",
                READERS,
                {"200": {"description": "PDF"}, "404": _ERROR},
                parameters=[_ITEM],
            )
        },
        "/api/items/due": {
            "get": _op(
                "Items with a certificate in force: due date and status, soonest first",
                READERS,
                {"200": _json("items"), "400": _ERROR},
                parameters=[_param("status", "query", "overdue, due or in date")],
            )
        },
        "/api/impact": {
            "get": _op(
                "Issued certificates that used a software version or model, or were issued "
                "in a date range (none given: all issued), with item and customer",
                AUDIT,
                {"200": _json("certificates"), "400": _ERROR},
                parameters=[
                    _param("software", "query", "coldcert version, or NAME=VERSION"),
                    _param("model", "query", "part of a model name"),
                    _param("from", "query", "issued on or after (YYYY-MM-DD)"),
                    _param("to", "query", "issued on or before (YYYY-MM-DD)"),
                    _param("in_force", "query", "1: only certificates in force"),
                ],
            )
        },
        "/api/impact/reproduce": {
            "post": _op(
                "Reproduce certificates in bulk through the job queue",
                AUDIT,
                {"202": _json("jobs and the report address"), "400": _ERROR, "409": _ERROR},
                requestBody=_body(
                    {
                        "certificate_ids": {"type": "array", "items": {"type": "string"}},
                        "fraction": {"type": "number"},
                    },
                    ["certificate_ids"],
                ),
            ),
            "get": _op(
                "Report of a bulk reproduction: results that moved by more than a fraction "
                "of their expanded uncertainty",
                AUDIT,
                {"200": _json("report"), "400": _ERROR},
                parameters=[
                    _param("jobs", "query", "job ids, comma-separated"),
                    _param("fraction", "query", "flag moves above this multiple of U (0.1)"),
                ],
            ),
        },
        "/api/public/check": {
            "get": {**check, "parameters": [_ID, _SHA]},
            "post": {
                **check,
                "summary": check["summary"] + " (the file as multipart field 'file', hashed "
                "as it arrives and not stored)",
                "parameters": [_ID],
            },
        },
    }
