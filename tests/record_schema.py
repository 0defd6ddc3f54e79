"""A small validator for docs/record.schema.json (the subset of JSON Schema the file uses).

Kept in the tests to avoid a dependency: type, enum, required, properties,
items, minItems, maxItems, minimum, maximum, exclusiveMinimum and local $ref.
"""

from __future__ import annotations

import json
from pathlib import Path

SCHEMA_PATH = Path(__file__).resolve().parents[1] / "docs" / "record.schema.json"

_TYPES = {
    "object": lambda v: isinstance(v, dict),
    "array": lambda v: isinstance(v, list),
    "string": lambda v: isinstance(v, str),
    "boolean": lambda v: isinstance(v, bool),
    "integer": lambda v: isinstance(v, int) and not isinstance(v, bool),
    "number": lambda v: isinstance(v, (int, float)) and not isinstance(v, bool),
    "null": lambda v: v is None,
}


def load_schema() -> dict:
    return json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))


def validate(value, schema: dict | None = None, *, root: dict | None = None, path: str = "$") -> list[str]:
    """Every violation of ``schema`` by ``value``, as 'path: message' strings (empty when valid)."""
    if schema is None:
        schema = root = load_schema()
    root = root if root is not None else schema
    if "$ref" in schema:
        ref = schema["$ref"]
        assert ref.startswith("#/"), ref
        target = root
        for part in ref[2:].split("/"):
            target = target[part]
        return validate(value, target, root=root, path=path)
    errors: list[str] = []
    types = schema.get("type")
    if types is not None:
        types = [types] if isinstance(types, str) else types
        if not any(_TYPES[t](value) for t in types):
            return [f"{path}: expected {' or '.join(types)}, got {type(value).__name__} {value!r:.60}"]
    if "enum" in schema and value not in schema["enum"]:
        errors.append(f"{path}: {value!r} is not one of {schema['enum']}")
    if _TYPES["number"](value):
        if "minimum" in schema and value < schema["minimum"]:
            errors.append(f"{path}: {value} < minimum {schema['minimum']}")
        if "maximum" in schema and value > schema["maximum"]:
            errors.append(f"{path}: {value} > maximum {schema['maximum']}")
        if "exclusiveMinimum" in schema and value <= schema["exclusiveMinimum"]:
            errors.append(f"{path}: {value} <= exclusive minimum {schema['exclusiveMinimum']}")
    if isinstance(value, dict):
        for key in schema.get("required", ()):
            if key not in value:
                errors.append(f"{path}: missing required key {key!r}")
        for key, sub in schema.get("properties", {}).items():
            if key in value:
                errors += validate(value[key], sub, root=root, path=f"{path}.{key}")
    if isinstance(value, list):
        if len(value) < schema.get("minItems", 0):
            errors.append(f"{path}: fewer than {schema['minItems']} items")
        if "maxItems" in schema and len(value) > schema["maxItems"]:
            errors.append(f"{path}: more than {schema['maxItems']} items")
        if "items" in schema:
            for i, item in enumerate(value):
                errors += validate(item, schema["items"], root=root, path=f"{path}[{i}]")
    return errors


def assert_record_schema(argv, rec: dict) -> None:
    """Check a command's ``--json`` output against the record schema (the commands that print records)."""
    command = argv[0]
    if command in ("phases", "calibrations", "tiltpair"):
        return  # their outputs are listings, not pattern records
    records = [rec]
    if command == "report":
        records = [rec["analysis"]]
    elif command == "batch":
        records = [json.loads(Path(p["record_path"]).read_text(encoding="utf-8"))
                   for p in rec["patterns"] if p.get("record_path") and p["record_path"].endswith(".json")]
    for r in records:
        errors = validate(r)
        assert not errors, f"{command} record breaks docs/record.schema.json: " + "; ".join(errors[:5])
