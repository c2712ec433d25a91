"""Command line: ``python -m calcs CASE.json`` (or ``-`` for standard input).

Reads one SIF case as JSON, prints one JSON result object on standard output.
Bad input: exit status 2 and one line on standard error naming the field.
"""

from __future__ import annotations

import json
import os
import sys

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy: see config/celery.py

USAGE = "usage: python -m calcs CASE.json   (use - to read the case from standard input)"


def _fail(message: str, code: int = 2) -> int:
    text = " ".join(str(message).split())  # keep it to one line
    print(f"error: {text}", file=sys.stderr)
    return code


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    if args in (["-h"], ["--help"]):
        print(USAGE)
        return 0
    if len(args) != 1:
        return _fail(USAGE)
    path = args[0]
    label = "standard input" if path == "-" else path
    try:
        if path == "-":
            text = sys.stdin.read()
        else:
            with open(path, encoding="utf-8") as handle:
                text = handle.read()
    except FileNotFoundError:
        return _fail(f"{label}: file not found")
    except IsADirectoryError:
        return _fail(f"{label}: is a directory, not a case file")
    except UnicodeDecodeError:
        return _fail(f"{label}: not UTF-8 text")
    except OSError as exc:
        return _fail(f"{label}: cannot be read ({exc.strerror or exc})")
    try:
        data = json.loads(text)  # NaN / Infinity are refused with their field by check_case
    except json.JSONDecodeError as exc:
        return _fail(f"{label}: not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})")
    except RecursionError:
        return _fail(f"{label}: the case is nested too deeply")

    try:
        from datetime import date

        from calcs.engine.case import evaluate_case
        from calcs.engine.errors import InputError
        from calcs.engine.history_case import check_case

        today = date.today()
        check_case(data, today=today)
        result = evaluate_case(data, today=today)
    except InputError as exc:
        return _fail(f"{exc.field}: {exc.message}")
    except RecursionError:
        return _fail(f"{label}: the case is nested too deeply")
    except Exception as exc:
        return _fail(f"internal error while evaluating the case: {type(exc).__name__}: {exc}", 1)
    try:
        output = json.dumps(result, indent=2, allow_nan=False)
    except ValueError as exc:
        return _fail(f"internal error: result is not valid JSON ({exc})", 1)
    print(output)
    return 0


if __name__ == "__main__":
    sys.exit(main())
