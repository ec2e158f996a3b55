"""The JSON Schema of plan.json (docs/plan.schema.json), loaded once for the tests."""

from __future__ import annotations

import functools
import json
from pathlib import Path

import jsonschema

SCHEMA = Path(__file__).resolve().parent.parent / "docs" / "plan.schema.json"


@functools.cache
def validator() -> jsonschema.Draft202012Validator:
    schema = json.loads(SCHEMA.read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema, format_checker=jsonschema.FormatChecker())
