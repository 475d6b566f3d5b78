"""Read a study file and check it against the JSON Schema: every problem at once.

Each problem is one line naming the key path and the rule, e.g.
"`sample_sizes[1]`: must be >= 1, got 0".
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import jsonschema
import yaml

from estbench.core.bundled import SCHEMA_FILE
from estbench.core.errors import UserError


class _StrictLoader(yaml.SafeLoader):
    """SafeLoader that refuses duplicate keys instead of keeping the last one."""


def _construct_mapping(loader, node, deep=False):
    seen = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in seen:
            raise yaml.constructor.ConstructorError(
                None, None, f"duplicate key {key!r}", key_node.start_mark)
        seen.add(key)
    return loader.construct_mapping(node, deep)


_StrictLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def read_yaml(path: Path | str) -> Any:
    """Parse a YAML file, turning syntax errors into one-line ``UserError``s."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise UserError(f"cannot read study file {path}: {exc.strerror}") from None
    except UnicodeDecodeError as exc:
        raise UserError(f"study file {path} is not UTF-8 text: byte 0x{exc.object[exc.start]:02x} "
                        f"at position {exc.start}") from None
    try:
        data = yaml.load(text, Loader=_StrictLoader)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        problem = getattr(exc, "problem", None) or str(exc)
        raise UserError(f"study file {path} is not valid YAML{where}: {problem}") from None
    if data is None:
        raise UserError(f"study file {path} is empty")
    return data


def load_schema() -> dict:
    """The study-file JSON Schema (shared with Snakemake's ``validate``)."""
    return yaml.safe_load(SCHEMA_FILE.read_text())


def key_path(parts) -> str:
    """``['dgms', 'a', 'params']`` -> ``dgms.a.params``; list indices in brackets."""
    out = ""
    for p in parts:
        out += f"[{p}]" if isinstance(p, int) else (f".{p}" if out else str(p))
    return out or "(top level)"


def _rule_text(err: jsonschema.ValidationError) -> str:
    v, s, inst = err.validator, err.schema, err.instance
    if "x-rule" in s:
        return f"{s['x-rule']}, got {inst!r}"
    if v == "type":
        want = s["type"] if isinstance(s["type"], str) else " or ".join(s["type"])
        article = "an" if want[0] in "aeiou" else "a"
        return f"must be {article} {want}, got {inst!r}"
    bounds = {"minimum": ">=", "maximum": "<=", "exclusiveMinimum": ">", "exclusiveMaximum": "<"}
    if v in bounds:
        return f"must be {bounds[v]} {err.validator_value}, got {inst!r}"
    if v == "minItems":
        return f"must have at least {err.validator_value} item(s)"
    if v == "minProperties":
        return f"must have at least {err.validator_value} entry"
    if v == "uniqueItems":
        return f"must not repeat a value, got {inst!r}"
    if v == "enum":
        return f"must be one of {', '.join(map(str, err.validator_value))}, got {inst!r}"
    return err.message


def schema_errors(raw: Any, schema: dict | None = None) -> list[tuple[tuple, str]]:
    """Every schema violation of *raw*: (key path of the offending key, one-line problem)."""
    schema = schema or load_schema()
    validator = jsonschema.Draft202012Validator(schema)
    errors = []
    for err in validator.iter_errors(raw):
        path = list(err.absolute_path)
        if err.validator == "additionalProperties":
            allowed = set(err.schema.get("properties", {}))
            for extra in sorted(set(err.instance) - allowed):
                hint = f"; allowed keys: {', '.join(sorted(allowed))}" if allowed else ""
                errors.append((tuple(path + [extra]), f"`{key_path(path + [extra])}`: unknown key{hint}"))
        elif err.validator == "required":
            missing = err.message.split("'")[1]
            errors.append((tuple(path + [missing]), f"`{key_path(path + [missing])}`: required key is missing"))
        elif "propertyNames" in err.schema_path:
            rule = err.schema.get("x-rule", "is not an allowed name")
            errors.append((tuple(path + [err.instance]), f"`{key_path(path)}`: key {err.instance!r} {rule}"))
        else:
            errors.append((tuple(path), f"`{key_path(path)}`: {_rule_text(err)}"))
    return errors


def schema_problems(raw: Any, schema: dict | None = None) -> list[str]:
    """Every schema violation of *raw* as one line each, sorted by key path."""
    return sorted({text for _, text in schema_errors(raw, schema)})
