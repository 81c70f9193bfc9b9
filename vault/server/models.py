"""The JSON request bodies (pydantic): unknown fields refused, every field typed and taken only as
the type the OpenAPI document states (strict: no 0 for false, no "2" for 2)."""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict, Field


class Body(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)


class AccessCheck(Body):
    purpose: str
    categories: list[str] = Field(min_length=1)


class NewMember(Body):
    name: str
    role: str
    expires_days: int = Field(30, ge=1, le=3660)


class NewToken(Body):
    expires_days: int = Field(30, ge=1, le=3660)


class Consistency(Body):
    head: dict[str, Any]


class EegExport(Body):
    purpose: str
    recipient: str | None = None
    demographics: bool = False


class MatrixExport(Body):
    purpose: str
    category: str
    epsilon: float | None = None
    rho: float | None = None
    release: str = "matrix"
    unit: str = "participant"
    items: list[str] | None = None
    max_items: int | None = Field(None, ge=1)
    recipient: str | None = None


class ExportCheck(Body):
    document: dict[str, Any]


class PolicyFiles(Body):
    files: dict[str, str] = Field(min_length=1)


class Withdrawal(Body):
    participant: str
    received: str
    scope: str = "full"


class Sweep(Body):
    dry_run: bool = False


class ErrorBody(Body):
    """Every error answer: one line, the exit code of docs/cli.md, and where to look."""

    error: str
    exit_code: int = Field(ge=1, le=11)
    hint: str | None
    param: str | None
