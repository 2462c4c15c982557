"""The OpenAPI document's component schemas: the bodies the API reads and answers."""

from __future__ import annotations

from typing import Any

REF = "#/components/schemas/"
NAME = {"type": "string", "pattern": "^[A-Za-z0-9_-]{1,64}$"}
NUMBER_OR_NULL = {"type": ["number", "null"]}


def ref(name: str) -> dict[str, str]:
    """A JSON reference to the component schema `name`."""
    return {"$ref": REF + name}


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
                "additionalProperties": ref("FieldSpec"),
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
            "features": ref("FeatureSpec"),
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
            "features": ref("FeatureSpec"),
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
            "snapshot": {"oneOf": [ref("Snapshot"), {"type": "null"}]},
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
                "items": ref("Event"),
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
                        "explain": {"type": "array", "items": ref("Explanation")},
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
                "items": ref("Label"),
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
