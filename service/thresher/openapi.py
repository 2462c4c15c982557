"""The OpenAPI 3.1 document served at ``/api/openapi.json``; tests hold the server to it.

The paths and operations live here; the component schemas they refer to are in
`openapi_schemas`.
"""

from __future__ import annotations

from typing import Any

from .openapi_schemas import NAME, SCHEMAS, ref


def _json(schema: dict[str, Any], description: str) -> dict[str, Any]:
    return {
        "description": description,
        "content": {
            "application/json": {"schema": schema},
            "application/msgpack": {"schema": schema},
        },
    }


def _problems(*codes: int) -> dict[str, Any]:
    return {str(code): {"$ref": f"#/components/responses/Problem{code}"} for code in codes}


COMMON = (400, 401, 403, 404, 413, 415, 422, 429, 503)

_MODEL_LINKS = {
    op: {"operationId": op, "parameters": {"model": "$response.body#/name"}}
    for op in (
        "getModel",
        "score",
        "postLabels",
        "getQuality",
        "listSnapshots",
        "takeSnapshot",
        "rebuild",
        "deleteModel",
    )
}

MODEL_PARAM = {"name": "model", "in": "path", "required": True, "schema": NAME}


def _op(
    summary: str,
    role: str | None,
    ok: dict[str, Any],
    *,
    body: str | None = None,
    errors: tuple[int, ...] = COMMON,
    op_id: str,
) -> dict[str, Any]:
    op: dict[str, Any] = {
        "operationId": op_id,
        "summary": summary,
        "responses": {**ok, **_problems(*errors)},
    }
    if role:
        op["description"] = f"Needs a token with the `{role}` role (admin implies every role)."
        op["security"] = [{"bearer": []}]
    if body:
        op["requestBody"] = {"required": True, **_json(ref(body), body)}
        del op["requestBody"]["description"]
    return op


def openapi_document(version: str) -> dict[str, Any]:
    """Build the document; paths and schemas mirror `thresher.http` exactly."""
    model_ok = {"200": _json(ref("Model"), "the model")}
    return {
        "openapi": "3.1.0",
        "info": {
            "title": "thresher",
            "version": version,
            "description": "Score events with an online-learning perceptron; post labels to "
            "train it; watch its mistake rate.",
        },
        "paths": {
            "/api/models": {
                "post": _op(
                    "Create a model",
                    "admin",
                    {"201": {**_json(ref("Model"), "created"), "links": _MODEL_LINKS}},
                    body="ModelCreate",
                    errors=(*COMMON, 409),
                    op_id="createModel",
                ),
                "get": _op(
                    "List models",
                    "score",
                    {
                        "200": _json(
                            {
                                "type": "object",
                                "required": ["models"],
                                "properties": {"models": {"type": "array", "items": ref("Model")}},
                            },
                            "all models",
                        )
                    },
                    op_id="listModels",
                ),
            },
            "/api/models/{model}": {
                "parameters": [MODEL_PARAM],
                "get": _op("Describe a model", "score", model_ok, op_id="getModel"),
                "delete": _op(
                    "Delete a model and its data",
                    "admin",
                    {"204": {"description": "deleted"}},
                    op_id="deleteModel",
                ),
            },
            "/api/models/{model}/score": {
                "parameters": [MODEL_PARAM],
                "post": _op(
                    "Score events",
                    "score",
                    {"200": _json(ref("ScoreResponse"), "one result per event")},
                    body="ScoreRequest",
                    op_id="score",
                ),
            },
            "/api/models/{model}/labels": {
                "parameters": [MODEL_PARAM],
                "post": _op(
                    "Post labels (train online)",
                    "label",
                    {"200": _json(ref("LabelAck"), "appended durably and applied")},
                    body="LabelRequest",
                    errors=(*COMMON, 409),
                    op_id="postLabels",
                ),
            },
            "/api/models/{model}/quality": {
                "parameters": [MODEL_PARAM],
                "get": _op(
                    "Mistake rates, confusion, drift",
                    "score",
                    {"200": _json(ref("Quality"), "quality report")},
                    op_id="getQuality",
                ),
            },
            "/api/models/{model}/snapshots": {
                "parameters": [MODEL_PARAM],
                "get": _op(
                    "List snapshot generations",
                    "score",
                    {
                        "200": _json(
                            {
                                "type": "object",
                                "required": ["snapshots"],
                                "properties": {
                                    "snapshots": {"type": "array", "items": ref("Snapshot")}
                                },
                            },
                            "newest first",
                        )
                    },
                    op_id="listSnapshots",
                ),
                "post": _op(
                    "Take a snapshot now",
                    "admin",
                    {"201": _json(ref("Snapshot"), "written")},
                    op_id="takeSnapshot",
                ),
            },
            "/api/models/{model}/snapshots/{generation}/restore": {
                "parameters": [
                    MODEL_PARAM,
                    {
                        "name": "generation",
                        "in": "path",
                        "required": True,
                        "schema": {"type": "integer", "minimum": 0},
                    },
                ],
                "post": _op(
                    "Roll the model back to a snapshot", "admin", model_ok, op_id="restoreSnapshot"
                ),
            },
            "/api/models/{model}/rebuild": {
                "parameters": [MODEL_PARAM],
                "post": _op(
                    "Relearn from the log, excluding label sources",
                    "admin",
                    model_ok,
                    body="Rebuild",
                    errors=(*COMMON, 409),
                    op_id="rebuild",
                ),
            },
            "/healthz": {
                "get": {
                    "operationId": "healthz",
                    "summary": "Alive",
                    "responses": {"200": {"description": "alive"}},
                }
            },
            "/readyz": {
                "get": {
                    "operationId": "readyz",
                    "summary": "Recovered and serving",
                    "responses": {"200": {"description": "ready"}, **_problems(503)},
                }
            },
            "/metrics": {
                "get": {
                    "operationId": "metrics",
                    "summary": "Prometheus text exposition",
                    "responses": {"200": {"description": "metrics", "content": {"text/plain": {}}}},
                }
            },
        },
        "components": {
            "schemas": SCHEMAS,
            "responses": {
                f"Problem{code}": {
                    "description": f"problem details ({code})",
                    "content": {"application/problem+json": {"schema": ref("Problem")}},
                    **(
                        {"headers": {"Retry-After": {"schema": {"type": "integer"}}}}
                        if code in (429, 503)
                        else {}
                    ),
                }
                for code in (*COMMON, 405, 409)
            },
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer"}},
        },
    }
