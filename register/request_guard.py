"""Two checks for every request, before any view: the size of its body and NUL
characters in its address parameters.

- A body larger than ``REQUEST_MAX_BYTES`` (by its ``Content-Length``) is refused with 413
  before it is read. Django limits form fields and JSON bodies
  (``DATA_UPLOAD_MAX_MEMORY_SIZE``) but not the files of a multipart upload; this is the
  one limit for the whole body (attachments and imports have their own, lower, limits).
- PostgreSQL cannot hold NUL in text, so a search or filter value carrying one (``?q=%00``)
  would fail inside the database. Forms and the API's filters refuse it field by field;
  views that read ``request.GET`` themselves (searches, the as-of date, page numbers) are
  covered here, once: 400 naming the parameter.

Answers are JSON under ``/api/``, plain text elsewhere.
"""

from __future__ import annotations

from django.conf import settings
from django.http import HttpResponse, JsonResponse

NUL_MESSAGE = "Null characters are not allowed."


def nul_parameter(query) -> str | None:
    """The first parameter of ``query`` (a QueryDict) whose name or a value holds NUL."""
    for name, values in query.lists():
        if "\x00" in name or any("\x00" in v for v in values):
            return name.replace("\x00", "\\0")
    return None


def _refuse(request, status: int, field: str, message: str):
    if request.path.startswith("/api/"):
        return JsonResponse({field: [message]}, status=status)
    return HttpResponse(f"{field}: {message}", status=status,
                        content_type="text/plain; charset=utf-8")


class RequestGuard:
    def __init__(self, get_response):
        self.get_response = get_response

    def __call__(self, request):
        try:
            length = int(request.META.get("CONTENT_LENGTH") or 0)
        except ValueError:
            length = 0
        limit = settings.REQUEST_MAX_BYTES
        if length > limit:
            return _refuse(request, 413, "body", f"The request is {length:,} bytes; at most "
                                                 f"{limit:,} bytes are accepted.")
        query = request.META.get("QUERY_STRING", "")
        if "%00" in query or "\x00" in query:
            name = nul_parameter(request.GET)
            if name is not None:
                return _refuse(request, 400, name, NUL_MESSAGE)
        return self.get_response(request)
