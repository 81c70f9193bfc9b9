"""The HTTP endpoints: each authenticates its caller's token and makes one library call; the
library decides who may do what. Success bodies are the documents `mindward ... --json` prints."""

from __future__ import annotations

import asyncio
import contextlib
import datetime as dt
import json
from collections.abc import AsyncIterator, Callable
from pathlib import Path
from typing import Annotated, Any

from fastapi import APIRouter, Depends, FastAPI, Query, Request
from fastapi import Path as PathParam
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response, StreamingResponse
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from starlette.exceptions import HTTPException

import vault
from vault.server import models
from vault.server.limits import BodyLimit
from vault.server.replies import document, error_body, headers_of, of_error, status_of
from vault.server.service import Service, policy_folder
from vault.server.uploads import BodyStream, stream_into

BEARER = HTTPBearer(auto_error=False, description="A member's token (mwt1-...), issued by a steward.")
Credentials = Annotated[HTTPAuthorizationCredentials | None, Depends(BEARER)]
router = APIRouter(prefix="/v1")
TOML = {"requestBody": {"required": True, "content": {
    "application/toml": {"schema": {"type": "string", "description": "A filled consent form (TOML)."}}}}}
CSV = {"requestBody": {"required": True, "content": {
    "text/csv": {"schema": {"type": "string", "description": "participant_id,item_id,value rows."}}}}}
EDF = {"requestBody": {"required": True, "content": {
    "application/octet-stream": {"schema": {"type": "string", "format": "binary",
                                            "description": "An EDF, EDF+ or BDF recording."}}}}}
TAR = {"200": {"content": {"application/x-tar": {"schema": {"type": "string", "format": "binary"}}},
               "description": "The export folder as a tar stream."}}


def build_app(service: Service | None = None) -> FastAPI:
    """The application; without a service (the OpenAPI document) every call is refused."""
    app = FastAPI(
        title="mindward", version=vault.__version__, openapi_url="/v1/openapi.json", docs_url=None,
        redoc_url=None, lifespan=_lifespan,
        description="A mindward vault as a service. Every endpoint but /v1/health and "
                    "/v1/openapi.json takes `Authorization: Bearer <token>`. Errors are "
                    '{"error", "exit_code", "hint", "param"} with the exit codes of docs/cli.md. '
                    "The vault holds special-category data: follow your ethics board's, "
                    "data-protection officer's and local law's rules.")
    app.state.service = service
    app.include_router(router)
    app.add_exception_handler(vault.VaultError, _vault_error)
    app.add_exception_handler(RequestValidationError, _invalid_request)
    app.add_exception_handler(HTTPException, _http_error)
    app.add_exception_handler(Exception, _internal_error)
    if service is not None:
        app.add_middleware(BodyLimit, upload_limit=service.options.upload_limit)
    return app


@contextlib.asynccontextmanager
async def _lifespan(app: FastAPI) -> AsyncIterator[None]:
    service: Service | None = app.state.service
    tasks = []
    if service is not None:
        tasks = [asyncio.ensure_future(service.sweep_forever()),
                 asyncio.ensure_future(service.expire_forever())]
    try:
        yield
    finally:
        for task in tasks:
            task.cancel()


# -- errors ----------------------------------------------------------------------------------------

def _reply(status: int, body: dict[str, Any], headers: dict[str, str] | None = None) -> Response:
    return Response(json.dumps(body), status_code=status, media_type="application/json",
                    headers=headers)


async def _vault_error(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, vault.VaultError)
    return _reply(status_of(exc), of_error(exc), headers_of(exc))


async def _invalid_request(request: Request, exc: Exception) -> Response:
    """Which field is wrong and why, never the value sent."""
    assert isinstance(exc, RequestValidationError)
    first = exc.errors()[0] if exc.errors() else {}
    where = ".".join(str(p) for p in first.get("loc", ()))
    param = str(first["loc"][-1]) if first.get("loc") else None
    return _reply(400, error_body(f"{where}: {first.get('msg', 'invalid request')}", 2, param=param))


async def _http_error(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, HTTPException)
    if isinstance(exc.__cause__, vault.VaultError):  # a body limit met while the framework read it
        return await _vault_error(request, exc.__cause__)
    if exc.status_code == 404:
        return _reply(404, error_body(f"no endpoint {request.url.path}", 6))
    if exc.status_code == 405:
        return _reply(405, error_body(f"{request.method} is not allowed on {request.url.path}", 2))
    return _reply(exc.status_code if 400 <= exc.status_code < 500 else 400,
                  error_body("the request is malformed", 2))


async def _internal_error(request: Request, exc: Exception) -> Response:
    return _reply(500, error_body(f"internal error ({type(exc).__name__}); the service's own log "
                                  "says where (a bug: please report it)", 1))


# -- calling the library -------------------------------------------------------------------------------

def _service(request: Request) -> Service:
    service: Service | None = request.app.state.service
    if service is None:
        raise vault.UsageError("no vault is being served")
    return service


def _client(request: Request) -> str:
    return request.client.host if request.client else "unknown"


def _token(credentials: HTTPAuthorizationCredentials | None) -> str:
    return credentials.credentials if credentials is not None else ""


async def _call(request: Request, credentials: HTTPAuthorizationCredentials | None, operation: str,
                fn: Callable[[vault.Vault], Any]) -> Response:
    result = await _service(request).call(_token(credentials), _client(request), operation, fn)
    return Response(document(result), media_type="application/json")


# -- facts, access, budget -------------------------------------------------------------------------------

@router.get("/health", name="health", operation_id="health")
async def health() -> dict[str, bool]:
    """Whether the service answers (no token, no facts)."""
    return {"ok": True}


@router.get("/info", name="info", operation_id="info")
async def info(request: Request, credentials: Credentials) -> Response:
    """Public facts about the vault, the sweep schedule, and who the caller is."""
    hours = _service(request).options.sweep_every_hours
    return await _call(request, credentials, "info",
                       lambda v: {**v.info(), "sweep_every_hours": hours})


@router.post("/access/check", name="access.check", operation_id="access_check")
async def access_check(body: models.AccessCheck, request: Request, credentials: Credentials) -> Response:
    """Who a request would include and why others are not (`access check`)."""
    return await _call(request, credentials, "access.check",
                       lambda v: v.access_summary(body.purpose, body.categories))


@router.get("/budget", name="budget", operation_id="budget")
async def budget(request: Request, credentials: Credentials, purpose: str | None = None) -> Response:
    """Privacy budget spent per purpose (`budget`)."""
    return await _call(request, credentials, "budget", lambda v: v.budget(purpose or None))


# -- the audit log -------------------------------------------------------------------------------------

@router.get("/audit/entries", name="audit.entries", operation_id="audit_entries")
async def audit_entries(request: Request, credentials: Credentials,
                        start: Annotated[int, Query(ge=0)] = 0,
                        limit: Annotated[int, Query(ge=1, le=10000)] = 50) -> Response:
    """Entries of the log, for roles that read it (`audit show`)."""
    return await _call(request, credentials, "audit.entries", lambda v: v.audit_entries(start, limit))


@router.get("/audit/head", name="audit.head.latest", operation_id="audit_head_latest")
async def audit_head_latest(request: Request, credentials: Credentials) -> Response:
    """The latest signed tree head."""
    def latest(v: vault.Vault) -> Any:
        head = vault.describe(v.path)["latest_tree_head"]
        if head is None:
            raise vault.NotFound("the log has no signed tree head yet")
        return head
    return await _call(request, credentials, "audit.head.latest", latest)


@router.post("/audit/head", name="audit.head", operation_id="audit_head")
async def audit_head(request: Request, credentials: Credentials) -> Response:
    """Sign a tree head over the log now (`audit head`)."""
    return await _call(request, credentials, "audit.head", lambda v: v.sign_head().to_dict())


@router.get("/audit/proof/{seq}", name="audit.proof", operation_id="audit_proof")
async def audit_proof(seq: Annotated[int, PathParam(ge=0)], request: Request,
                      credentials: Credentials) -> Response:
    """Inclusion proof of entry `seq` under the latest signed head (`audit prove`)."""
    return await _call(request, credentials, "audit.proof", lambda v: vault.prove(v.path, seq))


@router.post("/audit/consistency", name="audit.consistency", operation_id="audit_consistency")
async def audit_consistency(body: models.Consistency, request: Request,
                            credentials: Credentials) -> Response:
    """Does the log extend an earlier head you kept? (RFC 9162; `audit consistency`)"""
    def check(v: vault.Vault) -> Any:
        earlier = vault.read_tree_head(json.dumps(body.head))
        return vault.check_consistency(v.path, earlier, v.public_key)
    return await _call(request, credentials, "audit.consistency", check)


@router.get("/audit/verify", name="audit.verify", operation_id="audit_verify")
async def audit_verify(request: Request, credentials: Credentials) -> Response:
    """The whole log recomputed against its signed heads, with the stored key (`audit verify`)."""
    return await _call(request, credentials, "audit.verify",
                       lambda v: vault.verify_audit(v.path).as_dict())


@router.post("/verify", name="verify", operation_id="verify")
async def verify(request: Request, credentials: Credentials) -> Response:
    """The audit log and every stored blob authenticated (`verify`)."""
    return await _call(request, credentials, "verify", lambda v: v.verify())


# -- members -------------------------------------------------------------------------------------------

@router.get("/members", name="members.list", operation_id="members_list")
async def members_list(request: Request, credentials: Credentials) -> Response:
    return await _call(request, credentials, "members.list", lambda v: v.members())


@router.post("/members", name="members.add", operation_id="members_add")
async def members_add(body: models.NewMember, request: Request, credentials: Credentials) -> Response:
    """A token-only member; the token is in the answer, once."""
    return await _call(request, credentials, "members.add",
                       lambda v: v.add_member(body.name, body.role, expires_days=body.expires_days))


@router.post("/members/{name}/token", name="members.token", operation_id="members_token")
async def members_token(name: str, body: models.NewToken, request: Request,
                        credentials: Credentials) -> Response:
    return await _call(request, credentials, "members.token",
                       lambda v: v.issue_token(name, expires_days=body.expires_days))


@router.delete("/members/{name}", name="members.remove", operation_id="members_remove")
async def members_remove(name: str, request: Request, credentials: Credentials) -> Response:
    return await _call(request, credentials, "members.remove", lambda v: v.remove_member(name))


@router.post("/members/{name}/revoke", name="members.revoke", operation_id="members_revoke")
async def members_revoke(name: str, request: Request, credentials: Credentials) -> Response:
    return await _call(request, credentials, "members.revoke", lambda v: v.revoke_tokens(name))


# -- enrolment, consent, ingest ------------------------------------------------------------------------

@router.post("/enrol", name="enrol", operation_id="enrol", openapi_extra=TOML)
async def enrol(request: Request, credentials: Credentials) -> Response:
    form = await request.body()
    return await _call(request, credentials, "enrol", lambda v: v.enrol(form))


@router.get("/consent/{pid}", name="consent.show", operation_id="consent_show")
async def consent_show(pid: str, request: Request, credentials: Credentials) -> Response:
    return await _call(request, credentials, "consent.show", lambda v: v.consent_history(pid))


@router.post("/consent/{pid}", name="consent.amend", operation_id="consent_amend", openapi_extra=TOML)
async def consent_amend(pid: str, request: Request, credentials: Credentials) -> Response:
    form = await request.body()
    return await _call(request, credentials, "consent.amend", lambda v: v.amend_consent(pid, form))


@router.post("/ingest/eeg/{pid}", name="ingest.eeg", operation_id="ingest_eeg", openapi_extra=EDF)
async def ingest_eeg(pid: str, request: Request, credentials: Credentials,
                     event_codes: str | None = None, keep_sex: bool = False,
                     age_band: Annotated[int | None, Query(ge=1, le=50)] = None,
                     keep_header_identity: bool = False) -> Response:
    """A recording streamed into the vault (never held whole in memory); Content-Length required."""
    service = _service(request)
    length = request.headers.get("content-length", "")
    if not length.isdigit():
        raise vault.UsageError("an upload needs a Content-Length header")
    stream = BodyStream(asyncio.get_running_loop(), int(length))

    def ingest(v: vault.Vault) -> Any:
        return v.ingest_eeg_stream(pid, stream, int(length), event_codes=event_codes,
                                   keep_sex=keep_sex, age_band_years=age_band,
                                   keep_header_identity=keep_header_identity)

    work = service.worker.submit(service.as_member, _token(credentials), _client(request),
                                 "ingest.eeg", ingest)
    result = await stream_into(work, stream, request.stream())
    return Response(document(result), media_type="application/json")


@router.post("/ingest/scores", name="ingest.scores", operation_id="ingest_scores", openapi_extra=CSV)
async def ingest_scores(request: Request, credentials: Credentials,
                        kind: Annotated[str, Query()]) -> Response:
    """Derived scores or explicit ratings (one transaction); the CSV is held in memory only."""
    data = await request.body()
    return await _call(request, credentials, "ingest.scores", lambda v: v.ingest_scores_bytes(data, kind))


# -- exports -------------------------------------------------------------------------------------------

@router.post("/exports/eeg", name="exports.eeg", operation_id="exports_eeg")
async def exports_eeg(body: models.EegExport, request: Request, credentials: Credentials) -> Response:
    """An EEG-BIDS export into the outbox; download it from the `archive` path within the hour."""
    service = _service(request)
    async with service.export_slot():
        return await _call(request, credentials, "exports.eeg", lambda v: service.export_into_outbox(
            v, lambda out: v.export_eeg(body.purpose, out, recipient=body.recipient,
                                        with_demographics=body.demographics)))


@router.post("/exports/matrix", name="exports.matrix", operation_id="exports_matrix")
async def exports_matrix(body: models.MatrixExport, request: Request,
                         credentials: Credentials) -> Response:
    """A differentially private release into the outbox; download it from `archive`."""
    service = _service(request)
    async with service.export_slot():
        return await _call(request, credentials, "exports.matrix", lambda v: service.export_into_outbox(
            v, lambda out: v.export_matrix(
                body.purpose, body.category, out, epsilon=body.epsilon, rho=body.rho,
                release=body.release, unit=body.unit, recipient=body.recipient, items=body.items,
                max_items_per_participant=body.max_items)))


@router.get("/exports/{export_id}/archive", name="exports.archive", operation_id="exports_archive",
            responses=TAR)
async def exports_archive(export_id: str, request: Request, credentials: Credentials) -> Response:
    """The finished export as a tar stream, for the member who made it, once, within the hour."""
    service = _service(request)
    folder: Path = await service.call(_token(credentials), _client(request), "exports.archive",
                                      lambda v: service.outbox.find(export_id, v.member))
    from vault.formats.archive import pack

    def chunks() -> Any:
        yield from pack(folder)
        service.outbox.done(export_id)  # downloaded completely

    return StreamingResponse(chunks(), media_type="application/x-tar")


@router.post("/exports/check", name="exports.check", operation_id="exports_check")
async def exports_check(body: models.ExportCheck, request: Request, credentials: Credentials) -> Response:
    """Does an export someone holds now contain withdrawn or expired participants?"""
    return await _call(request, credentials, "exports.check", lambda v: v.check_export(body.document))


# -- policy ---------------------------------------------------------------------------------------------

@router.get("/policy", name="policy.show", operation_id="policy_show")
async def policy_show(request: Request, credentials: Credentials) -> Response:
    """The pinned policy set (`policy show`)."""
    return await _call(request, credentials, "policy.show", lambda v: {
        "version": v.policy.version, "lines": v.policy.lines()})


@router.post("/policy", name="policy.apply", operation_id="policy_apply")
async def policy_apply(body: models.PolicyFiles, request: Request, credentials: Credentials) -> Response:
    """Validate and pin a new policy set (`policy apply`)."""
    def apply(v: vault.Vault) -> Any:
        with policy_folder(body.files) as folder:
            return v.apply_policy(Path(folder))
    return await _call(request, credentials, "policy.apply", apply)


# -- withdrawal, sweep, report -----------------------------------------------------------------------------

@router.post("/withdrawals", name="withdrawals.request", operation_id="withdrawals_request")
async def withdrawals_request(body: models.Withdrawal, request: Request,
                              credentials: Credentials) -> Response:
    try:
        received = dt.date.fromisoformat(body.received)
    except ValueError:
        raise vault.UsageError("received is a date as YYYY-MM-DD", param="received") from None
    return await _call(request, credentials, "withdrawals.request", lambda v: v.withdraw_request(
        body.participant, received=received, scope=body.scope))


@router.get("/withdrawals", name="withdrawals.pending", operation_id="withdrawals_pending")
async def withdrawals_pending(request: Request, credentials: Credentials) -> Response:
    return await _call(request, credentials, "withdrawals.pending", lambda v: v.withdraw_pending())


@router.post("/withdrawals/{target}/process", name="withdrawals.process",
             operation_id="withdrawals_process")
async def withdrawals_process(target: str, request: Request, credentials: Credentials) -> Response:
    return await _call(request, credentials, "withdrawals.process", lambda v: v.withdraw_process(target))


@router.get("/withdrawals/{target}/receipt", name="withdrawals.receipt",
            operation_id="withdrawals_receipt")
async def withdrawals_receipt(target: str, request: Request, credentials: Credentials) -> Response:
    return await _call(request, credentials, "withdrawals.receipt", lambda v: v.withdraw_receipt(target))


@router.post("/sweep", name="sweep", operation_id="sweep")
async def sweep(body: models.Sweep, request: Request, credentials: Credentials) -> Response:
    return await _call(request, credentials, "sweep", lambda v: v.sweep(dry_run=body.dry_run))


@router.get("/report", name="report", operation_id="report")
async def report(request: Request, credentials: Credentials) -> Response:
    """A record of processing (GDPR Art. 30 style): definitions and counts only."""
    return await _call(request, credentials, "report", lambda v: v.report())
