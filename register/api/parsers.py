"""The API's JSON parser: the one check of a request body's shape before any serializer.

A body nested deeper than :data:`MAX_DEPTH` (lists or objects inside each other), or one
that holds a number that is not finite (``NaN``, ``Infinity``, or ``1e400``, which reads
as infinity), is refused with 400, keyed by the field where it was found. Nothing reads
the body recursively before this check: the walk below is iterative, and the decoder's
own recursion limit is answered as "nested too deeply" as well.
"""

from __future__ import annotations

import codecs
import json
import math

from django.conf import settings
from rest_framework.exceptions import ParseError, ValidationError
from rest_framework.parsers import JSONParser

#: Deepest nesting of lists and objects a request body may have. The deepest body the API
#: takes (bulk results: a list of records, each with a list of results) is 3 levels.
MAX_DEPTH = 32


def _where(path: tuple) -> str:
    return "".join(f"[{p}]" if isinstance(p, int) else f".{p}" for p in path).lstrip(".")


def check_body(data) -> None:
    """Refuse ``data`` (a decoded JSON body) nested deeper than MAX_DEPTH or holding a
    number that is not finite; the error is keyed by the top-level field."""
    stack = [(data, (), 0)]
    while stack:
        value, path, depth = stack.pop()
        if isinstance(value, float) and not math.isfinite(value):
            key = str(path[0]) if path and not isinstance(path[0], int) else _where(path)
            where = _where(path)
            raise ValidationError({key or "non_field_errors": [
                f"must be a finite number, got {value!r}"
                + (f" (at {where})" if where and where != key else "")]})
        if isinstance(value, (dict, list)):
            if depth >= MAX_DEPTH:
                raise ParseError(f"JSON parse error - the body is nested more than "
                                 f"{MAX_DEPTH} levels deep.")
            items = value.items() if isinstance(value, dict) else enumerate(value)
            stack.extend((item, (*path, key), depth + 1) for key, item in items)


class LedgerJSONParser(JSONParser):
    """DRF's JSON parser with :func:`check_body`: ``NaN`` and ``Infinity`` are read as
    numbers only to be refused with the name of their field."""

    def parse(self, stream, media_type=None, parser_context=None):
        parser_context = parser_context or {}
        encoding = parser_context.get("encoding", settings.DEFAULT_CHARSET)
        try:
            data = json.load(codecs.getreader(encoding)(stream), parse_constant=float)
        except RecursionError:
            raise ParseError(f"JSON parse error - the body is nested more than {MAX_DEPTH} "
                             "levels deep.") from None
        except ValueError as exc:
            raise ParseError(f"JSON parse error - {exc}") from None
        check_body(data)
        return data
