"""Checking a pipeline document against the JSON Schema kept in ``schema.json`` next to
this module: unknown keys are errors that name the key and the allowed ones; then the
meaning checks of :mod:`invariance.spec.checks`. One clear line per problem."""

from __future__ import annotations

import json
import pathlib
from functools import lru_cache
from typing import Mapping

import jsonschema

from ..errors import SpecificationError, shorten
from .checks import check_finite_numbers, check_meaning

__all__ = ["SCHEMA_PATH", "schema", "validate_document"]

SCHEMA_PATH = pathlib.Path(__file__).with_name("schema.json")


@lru_cache(maxsize=1)
def schema() -> dict:
    """The pipeline JSON Schema (read once)."""
    return json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))


@lru_cache(maxsize=1)
def _validator() -> jsonschema.Draft202012Validator:
    """The schema's validator (built once; it keeps no state between documents)."""
    return jsonschema.Draft202012Validator(schema())


def _path_text(path) -> str:
    parts = [str(p) for p in path]
    return ".".join(parts) if parts else "(top level)"


def validate_document(doc: Mapping) -> None:
    """Validate a pipeline document against the schema; raise one clear error."""

    check_finite_numbers(doc)
    errors = sorted(_validator().iter_errors(doc), key=lambda e: (len(e.absolute_path), list(map(str, e.absolute_path))))
    if not errors:
        check_meaning(doc)
        return
    err = errors[0]
    # unknown keys come first: they are the most common mistake
    for e in errors:
        if e.validator == "additionalProperties":
            err = e
            break
    while err.context:
        flat = list(_descendants(err))
        unknown = [c for c in flat if c.validator == "additionalProperties"]
        if unknown:
            err = unknown[0]
            break
        # prefer the branch whose type matched: drop bare type/enum mismatches
        matched = [c for c in err.context if c.validator not in ("type", "enum")]
        err = matched[0] if matched else jsonschema.exceptions.best_match(err.context)
        if not err.context:
            break
    where = _path_text(err.absolute_path)
    if err.validator == "additionalProperties":
        allowed = sorted(err.schema.get("properties", {}))
        extra = sorted(set(err.instance) - set(allowed))
        sect = "the pipeline" if not err.absolute_path else f"section {where!r}"
        raise SpecificationError(
            f"Unknown key {shorten(extra[0])} in {sect}; allowed keys: {', '.join(allowed)}."
        )
    if err.validator == "required":
        sect = "the pipeline" if not err.absolute_path else f"section {where!r}"
        missing = err.message.split("'")[1] if "'" in err.message else err.message
        raise SpecificationError(f"Required key {missing!r} is missing from {sect}; add it.")
    raise SpecificationError(
        f"Invalid value for {shorten(where, 120)[1:-1]}: {_short_message(err)}; fix it (see the pipeline reference in README.md)."
    )


def _short_message(err) -> str:
    """The schema message with the offending value quoted short (it may be huge)."""
    message = err.message
    whole = repr(err.instance)
    if len(whole) > 80 and whole in message:
        message = message.replace(whole, shorten(err.instance))
    return message if len(message) <= 300 else message[:240] + "..." + message[-40:]


def _descendants(err):
    for c in err.context or ():
        yield c
        yield from _descendants(c)
