"""What each person's menu offers and where each person lands after signing in, from the
one rights table (``register.permissions``): a link appears only where its page would
open for that person."""

from __future__ import annotations

from dataclasses import dataclass

from django.urls import reverse

from register.permissions import Action, can_somewhere


@dataclass(frozen=True)
class Item:
    label: str
    url_name: str
    action: str

    @property
    def url(self) -> str:
        return reverse(self.url_name)


#: In menu order; each item shows to a person who holds its right at some site.
ITEMS = (
    Item("Overview", "register:home", Action.VIEW),
    Item("Register", "register:sif_list", Action.VIEW),
    Item("My tests", "field:worklist", Action.RECORD_TEST),
    Item("Operations", "operations:home", Action.RECORD_DEMAND),
    Item("To countersign", "field:verify_queue", Action.VERIFY_TEST),
    Item("Deferrals", "deferrals:list", Action.REQUEST_DEFERRAL),
    Item("Evidence", "audit:packs", Action.EXPORT),
    Item("Chain check", "audit:chain", Action.VIEW_CHAIN),
    Item("Import", "register:import", Action.EDIT_REGISTER),
)

#: Where each kind of person starts, first match wins: the lead at the overview, a
#: verifier at the queue, an auditor at the evidence, a technician at the tests.
LANDING = (
    (Action.EDIT_REGISTER, "register:home"),
    (Action.VERIFY_TEST, "field:verify_queue"),
    (Action.VIEW_CHAIN, "audit:packs"),
    (Action.RECORD_TEST, "field:worklist"),
)


def menu_items(user) -> list[Item]:
    if user is None or not user.is_authenticated:
        return []
    return [item for item in ITEMS if can_somewhere(user, item.action)]


def landing_url(user) -> str:
    for action, url_name in LANDING:
        if can_somewhere(user, action):
            return reverse(url_name)
    return reverse("register:sif_list")


def menu(request) -> dict:
    """Template context: ``menu`` (the person's items) and ``landing`` (their start)."""
    user = getattr(request, "user", None)
    items = menu_items(user)
    return {"menu": items, "landing": landing_url(user) if items else "/"}
