"""The HTTP API reference (``docs/api.md``) rendered from the app's own OpenAPI schema."""

from __future__ import annotations

from typing import Any

from veil.server.app import create_app
from veil.server.errors import ERROR_CODES
from veil.server.settings import ServiceSettings

_METHODS = ("get", "post", "put", "delete")


def _parameters(operation: dict[str, Any]) -> list[str]:
    rows = []
    for parameter in operation.get("parameters", []):
        schema = parameter.get("schema", {})
        kind = schema.get("type") or "/".join(s.get("type", "?") for s in schema.get("anyOf", []) if "type" in s)
        required = "required" if parameter.get("required") else "optional"
        description = parameter.get("description", "")
        rows.append(f"| `{parameter['name']}` | {parameter['in']} | {kind} | {required} | {description} |")
    return rows


def _body(operation: dict[str, Any]) -> list[str]:
    content = operation.get("requestBody", {}).get("content", {})
    lines = []
    for media, spec in content.items():
        schema = spec.get("schema", {})
        fields = ", ".join(f"`{name}`" for name in schema.get("properties", {}))
        lines.append(f"- `{media}`" + (f": an object with {fields}" if fields else ": the binary array"))
    return lines


def _answers(operation: dict[str, Any]) -> str:
    """The documented statuses, each error status with its codes."""
    parts = []
    for status, response in sorted(operation.get("responses", {}).items()):
        schema = response.get("content", {}).get("application/json", {}).get("schema", {})
        codes = schema.get("properties", {}).get("error", {}).get("properties", {}).get("code", {}).get("enum", [])
        parts.append(f"{status}" + (f" ({', '.join(f'`{code}`' for code in codes)})" if codes else ""))
    return "Answers: " + "; ".join(parts) + "."


def render_api_reference() -> str:
    """Markdown for every route of the app, in path order: summary, parameters, request bodies, errors."""
    schema = create_app(ServiceSettings(registry="/not-read-when-rendering")).openapi()
    lines = [
        "# HTTP API reference",
        "",
        f"Generated from the OpenAPI schema of veil {schema['info']['version']} by "
        "`scripts/write_api_reference.py`; a test fails when this file is out of date. "
        "The live schema is served at `/openapi.json`, and `docs/service.md` explains the behaviour.",
        "",
    ]
    for path, item in sorted(schema["paths"].items()):
        for method in _METHODS:
            operation = item.get(method)
            if operation is None:
                continue
            lines += [f"## `{method.upper()} {path}`", "", operation.get("summary", ""), ""]
            parameters = _parameters(operation)
            if parameters:
                lines += [
                    "| parameter | in | type | | description |",
                    "| --- | --- | --- | --- | --- |",
                    *parameters,
                    "",
                ]
            body = _body(operation)
            if body:
                lines += ["Request body:", "", *body, ""]
            lines += [_answers(operation), ""]
    lines += ["## Error codes", "", "| status | code | meaning |", "| --- | --- | --- |"]
    lines += [
        f"| {status} | `{code}` | {meaning} |"
        for code, (status, meaning) in sorted(ERROR_CODES.items(), key=lambda e: (e[1][0], e[0]))
    ]
    return "\n".join(lines) + "\n"
