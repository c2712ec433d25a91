"""After signing in (with no page asked for), each person starts where their work is."""

from django.contrib.auth.decorators import login_required
from django.shortcuts import redirect

from register.accounts.menu import landing_url


@login_required
def landing(request):
    return redirect(landing_url(request.user))
