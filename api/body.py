"""JSON bodies of the hot routes (lease and report), parsed and written by pydantic-core.

FastAPI decodes a JSON body with the standard library, then validates the Python objects; for
the result of a run (hundreds or thousands of numbers, on every report) pydantic's own JSON
parser does both at several times the speed. Errors keep FastAPI's shape and locations
(``["body", ...]``) and go through the same problem handler, so clients see no difference.
Answers already built as response models are written straight to JSON, skipping FastAPI's
second validation of them; the routes still declare ``response_model`` for the OpenAPI
document.
"""

from __future__ import annotations

from email.message import Message
from typing import Any, TypeVar

from fastapi import Request, Response
from fastapi.exceptions import RequestValidationError
from pydantic import BaseModel, ValidationError

__all__ = ["add_body_schemas", "json_body", "json_response", "parse_body"]

M = TypeVar("M", bound=BaseModel)


#: The UTF-8 byte order mark.
_BOM = b"\xef\xbb\xbf"
#: Models documented by `json_body`, added to the OpenAPI components by `add_body_schemas`.
_DOCUMENTED: dict[str, type[BaseModel]] = {}
_REF = "#/components/schemas/{model}"


def json_body(model: type[BaseModel]) -> dict[str, Any]:
    """``openapi_extra`` that documents ``model`` as the required JSON request body."""
    _DOCUMENTED[model.__name__] = model
    schema = {"$ref": _REF.format(model=model.__name__)}
    return {"requestBody": {"required": True, "content": {"application/json": {"schema": schema}}}}


def add_body_schemas(document: dict[str, Any]) -> dict[str, Any]:
    """Add the schemas of the `json_body` models (and the models they nest) to an OpenAPI
    document's components."""
    schemas = document.setdefault("components", {}).setdefault("schemas", {})
    for name, model in _DOCUMENTED.items():
        schema = model.model_json_schema(ref_template=_REF)
        schemas.update(schema.pop("$defs", {}))
        schemas[name] = schema
    return document


def _is_json(content_type: str) -> bool:
    message = Message()
    message["content-type"] = content_type
    subtype = message.get_content_subtype()
    return message.get_content_maintype() == "application" and (
        subtype == "json" or subtype.endswith("+json")
    )


async def parse_body(request: Request, model: type[M]) -> M:
    """The request body as ``model``; `RequestValidationError` (422) when it is not one.

    A missing Content-Type is read as JSON (a lenient choice: curl without ``-H`` works);
    another media type is refused. A leading UTF-8 byte order mark is skipped, as RFC 8259
    section 8.1 allows and the standard library's decoder did for these routes before.
    """
    raw = await request.body()
    if raw.startswith(_BOM):
        raw = raw[len(_BOM) :]
    content_type = request.headers.get("content-type")
    if not raw:
        raise RequestValidationError(
            [{"type": "missing", "loc": ("body",), "msg": "Field required", "input": None}]
        )
    if content_type and not _is_json(content_type):
        raise RequestValidationError(
            [
                {
                    "type": "model_attributes_type",
                    "loc": ("body",),
                    "msg": f"the body must be JSON (Content-Type: application/json), "
                    f"not {content_type}",
                    "input": None,
                }
            ]
        )
    try:
        return model.model_validate_json(raw)
    except ValidationError as exc:
        errors = [{**e, "loc": ("body", *e["loc"])} for e in exc.errors(include_url=False)]
        raise RequestValidationError(errors) from None


def json_response(model: BaseModel, headers: dict[str, str] | None = None) -> Response:
    """``model`` as a 200 JSON answer."""
    return Response(model.model_dump_json(), media_type="application/json", headers=headers)
