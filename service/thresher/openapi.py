"""The OpenAPI 3.1 document served at ``/api/openapi.json``; tests hold the server to it."""

from __future__ import annotations

from typing import Any

REF = "#/components/schemas/"
NAME = {"type": "string", "pattern": "^[A-Za-z0-9_-]{1,64}$"}
NUMBER_OR_NULL = {"type": ["number", "null"]}


def _ref(name: str) -> dict[str, str]:
    return {"$ref": REF + name}


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

SCHEMAS: dict[str, Any] = {
    "Problem": {
        "type": "object",
        "description": "RFC 9457 problem details.",
        "required": ["type", "title", "status", "detail"],
        "properties": {
            "type": {"type": "string"},
            "title": {"type": "string"},
            "status": {"type": "integer"},
            "detail": {"type": "string"},
            "path": {"type": "string", "description": "JSON path of the offending value"},
        },
    },
    "FieldSpec": {
        "oneOf": [
            {
                "type": "object",
                "required": ["kind"],
                "additionalProperties": False,
                "properties": {"kind": {"enum": ["categorical", "set"]}},
            },
            {
                "type": "object",
                "required": ["kind"],
                "additionalProperties": False,
                "properties": {
                    "kind": {"const": "text"},
                    "ngrams": {"type": "integer", "minimum": 1, "maximum": 5, "default": 1},
                    "char_ngrams": {"enum": [0, 2, 3, 4, 5, 6], "default": 0},
                },
            },
            {
                "type": "object",
                "required": ["kind"],
                "additionalProperties": False,
                "properties": {
                    "kind": {"const": "numeric"},
                    "log1p": {"type": "boolean", "default": False},
                    "clip": {
                        "type": "array",
                        "items": {"type": "number"},
                        "minItems": 2,
                        "maxItems": 2,
                        "description": "[lo, hi] with lo < hi",
                    },
                    "buckets": {
                        "type": "array",
                        "items": {"type": "number"},
                        "minItems": 1,
                        "maxItems": 1024,
                        "description": "strictly increasing edges; the value becomes a token",
                    },
                },
            },
        ]
    },
    "FeatureSpec": {
        "type": ["object", "null"],
        "description": "Field kinds, crosses and limits; null infers kinds from the values. "
        "A cross names 2 or 3 distinct declared non-text fields.",
        "additionalProperties": False,
        "properties": {
            "fields": {
                "type": "object",
                "propertyNames": {"minLength": 1},
                "additionalProperties": _ref("FieldSpec"),
            },
            "crosses": {
                "type": "array",
                "items": {
                    "type": "array",
                    "items": {"type": "string"},
                    "minItems": 2,
                    "maxItems": 3,
                    "uniqueItems": True,
                },
            },
            "strict": {"type": "boolean", "default": False},
            "max_string_bytes": {"type": "integer", "minimum": 1, "default": 65536},
            "max_tokens": {"type": "integer", "minimum": 1, "default": 100000},
        },
    },
    "ModelCreate": {
        "type": "object",
        "required": ["name", "classes"],
        "additionalProperties": False,
        "properties": {
            "name": NAME,
            "classes": {
                "type": "array",
                "minItems": 2,
                "uniqueItems": True,
                "items": {"type": "string", "minLength": 1, "maxLength": 128},
            },
            "features": _ref("FeatureSpec"),
            "bits": {"type": "integer", "minimum": 10, "maximum": 28, "default": 20},
            "rule": {
                "enum": ["classic", "margin", "averaged", "passive_aggressive"],
                "default": "classic",
            },
            "margin": {"type": "number", "minimum": 0, "default": 0},
            "aggressiveness": {"type": "number", "exclusiveMinimum": 0, "default": 1},
            "seed": {"type": "integer", "minimum": 0, "maximum": 4294967295, "default": 0},
            "signed": {"type": "boolean", "default": True},
        },
    },
    "Snapshot": {
        "type": "object",
        "required": ["generation", "offset", "time", "bytes"],
        "properties": {
            "generation": {"type": "integer"},
            "offset": {"type": "integer"},
            "time": {"type": "number"},
            "bytes": {"type": "integer"},
        },
    },
    "Model": {
        "type": "object",
        "required": [
            "name",
            "classes",
            "bits",
            "rule",
            "labelled",
            "mistakes",
            "offset",
            "head",
            "digest",
            "nonzero",
            "hash_load",
            "cache_entries",
        ],
        "properties": {
            "name": {"type": "string"},
            "classes": {"type": "array", "items": {"type": "string"}},
            "features": _ref("FeatureSpec"),
            "bits": {"type": "integer"},
            "rule": {"type": "string"},
            "margin": {"type": "number"},
            "aggressiveness": {"type": "number"},
            "seed": {"type": "integer"},
            "signed": {"type": "boolean"},
            "created": {"type": "number"},
            "labelled": {"type": "integer"},
            "mistakes": {"type": "integer"},
            "scored": {"type": "integer"},
            "duplicates": {"type": "integer"},
            "offset": {"type": "integer", "description": "next log offset to apply"},
            "head": {"type": "integer", "description": "next log offset to be written"},
            "digest": {"type": "string", "description": "SHA-256 of weights and counters"},
            "weights_digest": {"type": "string"},
            "nonzero": {"type": "integer"},
            "hash_load": {"type": "number"},
            "cache_entries": {"type": "integer"},
            "last_update": NUMBER_OR_NULL,
            "excluded_sources": {"type": "array", "items": {"type": "string"}},
            "snapshot": {"oneOf": [_ref("Snapshot"), {"type": "null"}]},
        },
    },
    "Event": {
        "type": "object",
        "required": ["fields"],
        "additionalProperties": False,
        "properties": {
            "id": {"type": ["string", "null"], "minLength": 1, "maxLength": 256},
            "fields": {"type": "object"},
        },
    },
    "ScoreRequest": {
        "type": "object",
        "required": ["events"],
        "additionalProperties": False,
        "properties": {
            "events": {
                "type": "array",
                "minItems": 1,
                "items": _ref("Event"),
                "description": "at most --max-events (default 10,000); more is a 413",
            },
            "explain": {"type": "integer", "minimum": 0, "maximum": 50, "default": 0},
        },
    },
    "Explanation": {
        "type": "object",
        "required": ["token", "weight", "value", "contribution"],
        "properties": {
            "token": {"type": "string"},
            "weight": {"type": "number"},
            "value": {"type": "number"},
            "contribution": {"type": "number"},
        },
    },
    "ScoreResponse": {
        "type": "object",
        "required": ["results"],
        "properties": {
            "results": {
                "type": "array",
                "items": {
                    "type": "object",
                    "required": ["id", "label", "margin"],
                    "properties": {
                        "id": {"type": ["string", "null"]},
                        "label": {"type": "string"},
                        "margin": {"type": "number"},
                        "margins": {"type": "object", "additionalProperties": {"type": "number"}},
                        "explain": {"type": "array", "items": _ref("Explanation")},
                    },
                },
            }
        },
    },
    "Label": {
        "type": "object",
        "required": ["label"],
        "additionalProperties": False,
        "properties": {
            "id": {"type": ["string", "null"], "minLength": 1, "maxLength": 256},
            "label": {"type": "string"},
            "fields": {"type": "object"},
        },
    },
    "LabelRequest": {
        "type": "object",
        "required": ["labels", "source"],
        "additionalProperties": False,
        "properties": {
            "labels": {
                "type": "array",
                "minItems": 1,
                "items": _ref("Label"),
                "description": "at most --max-labels (default 10,000); more is a 413",
            },
            "source": {"type": "string", "minLength": 1, "maxLength": 128},
            "wait": {
                "type": "boolean",
                "default": False,
                "description": "answer only once this replica has applied the labels",
            },
        },
    },
    "LabelAck": {
        "type": "object",
        "required": ["applied", "duplicates", "mistakes", "offset"],
        "properties": {
            "applied": {"type": "integer"},
            "duplicates": {"type": "integer"},
            "mistakes": {"type": ["integer", "null"]},
            "offset": {"type": "integer"},
        },
    },
    "Quality": {
        "type": "object",
        "required": ["model", "labelled", "mistakes", "mistake_rate", "served", "drift"],
        "properties": {
            "model": {"type": "string"},
            "labelled": {"type": "integer"},
            "mistakes": {"type": "integer"},
            "mistake_rate": {"type": "object", "additionalProperties": NUMBER_OR_NULL},
            "served": {"type": "object"},
            "drift": {"type": "object"},
            "recent_mistakes": {"type": "array", "items": {"type": "object"}},
        },
    },
    "Rebuild": {
        "type": "object",
        "additionalProperties": False,
        "properties": {
            "exclude_sources": {"type": "array", "items": {"type": "string"}},
            "from_snapshot": {"type": "boolean", "default": False},
        },
    },
}

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
        op["requestBody"] = {"required": True, **_json(_ref(body), body)}
        del op["requestBody"]["description"]
    return op


def openapi_document(version: str) -> dict[str, Any]:
    """Build the document; paths and schemas mirror `thresher.http` exactly."""
    model_ok = {"200": _json(_ref("Model"), "the model")}
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
                    {"201": {**_json(_ref("Model"), "created"), "links": _MODEL_LINKS}},
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
                                "properties": {"models": {"type": "array", "items": _ref("Model")}},
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
                    {"200": _json(_ref("ScoreResponse"), "one result per event")},
                    body="ScoreRequest",
                    op_id="score",
                ),
            },
            "/api/models/{model}/labels": {
                "parameters": [MODEL_PARAM],
                "post": _op(
                    "Post labels (train online)",
                    "label",
                    {"200": _json(_ref("LabelAck"), "appended durably and applied")},
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
                    {"200": _json(_ref("Quality"), "quality report")},
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
                                    "snapshots": {"type": "array", "items": _ref("Snapshot")}
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
                    {"201": _json(_ref("Snapshot"), "written")},
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
                    "content": {"application/problem+json": {"schema": _ref("Problem")}},
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
