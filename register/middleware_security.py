"""Response headers that keep a signed-in user's pages out of every cache.

A page, API answer, chart or download shown to a signed-in user holds plant data that a
shared browser, a proxy or the back button must not keep: each such response is marked
``Cache-Control: private, no-store``. Static files (the stylesheets, scripts and the API
documentation's assets) stay cacheable: they carry no data of anyone.
"""

from django.conf import settings
from django.utils.cache import patch_cache_control

_STATIC_MARK = "_static_asset"


def static_asset(view):
    """Mark a view's responses as static files, left cacheable for signed-in users too."""

    def wrapped(request, *args, **kwargs):
        response = view(request, *args, **kwargs)
        setattr(response, _STATIC_MARK, True)
        return response

    wrapped.__name__ = getattr(view, "__name__", "static_asset")
    wrapped.__doc__ = view.__doc__
    return wrapped


def is_static(request, response) -> bool:
    static_url = "/" + settings.STATIC_URL.lstrip("/")
    return getattr(response, _STATIC_MARK, False) or request.path_info.startswith(static_url)


class NoStoreWhenSignedIn:
    """``Cache-Control: private, no-store`` on every response to a signed-in user.

    Placed after the authentication middleware; an API request signed with a token counts
    too (the REST framework hands the user it authenticated back to the request)."""

    def __init__(self, get_response):
        self.get_response = get_response

    def __call__(self, request):
        response = self.get_response(request)
        user = getattr(request, "user", None)
        if user is not None and user.is_authenticated and not is_static(request, response):
            # Replace whatever a view allowed (max-age, public): no-store wins outright.
            if "Cache-Control" in response:
                del response["Cache-Control"]
            patch_cache_control(response, private=True, no_store=True)
        return response
