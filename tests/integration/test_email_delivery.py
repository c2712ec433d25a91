"""Notifications are e-mailed through a real SMTP server on loopback: counted as sent only
when the server accepted them, retried after a failure, subjects cut at a word, bodies
with the link."""

import socket

import pytest
from aiosmtpd.controller import Controller

from register import choices
from register.inbox.delivery import email_subject, send_pending_emails
from register.models import Notification
from tests import factories as f

pytestmark = pytest.mark.django_db


class Inbox:
    def __init__(self):
        self.messages = []

    async def handle_DATA(self, server, session, envelope):
        self.messages.append(envelope)
        return "250 OK"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def smtp(settings):
    inbox = Inbox()
    port = _free_port()
    controller = Controller(inbox, hostname="127.0.0.1", port=port)
    controller.start()
    settings.EMAIL_BACKEND = "django.core.mail.backends.smtp.EmailBackend"
    settings.EMAIL_HOST, settings.EMAIL_PORT = "127.0.0.1", port
    settings.EMAIL_TIMEOUT = 5
    settings.SITE_URL = "https://ledger.example.invalid"
    yield inbox, port
    controller.stop()


def _notes(n=2):
    site = f.site()
    lead = f.user("lead-mail", site=site, role=choices.Role.LEAD, email="lead@example.invalid")
    long = ("U10-SIF-101 (High-high level in desalter V-1001 closes inlet): Does not meet its "
            "target: achieved PFDavg over the last 12 months 2.39e-02 is above the target")
    return [Notification.objects.create(recipient=lead, site=site,
                                        kind=choices.NotificationKind.TARGET,
                                        subject_key=f"k{i}", message=long, link="/sifs/1/")
            for i in range(n)]


def test_sent_only_when_accepted_and_retried_after_a_failure(smtp, settings):
    inbox, port = smtp
    notes = _notes()
    settings.EMAIL_PORT = _free_port()  # nothing listens there: the send fails
    assert send_pending_emails() == 0
    for n in Notification.objects.filter(pk__in=[x.pk for x in notes]):
        assert n.emailed_at is None and n.email_attempts == 1 and n.email_error
    assert inbox.messages == []
    settings.EMAIL_PORT = port  # the server is back: the next run delivers both
    assert send_pending_emails() == 2
    assert len(inbox.messages) == 2
    assert send_pending_emails() == 0  # and never twice
    body = inbox.messages[0].content.decode()
    assert "https://ledger.example.invalid/sifs/1/" in body
    assert "do not replace, a functional safety assessment" in body
    for n in Notification.objects.filter(pk__in=[x.pk for x in notes]):
        assert n.emailed_at is not None and n.email_error == ""


def test_subject_is_cut_at_a_word_and_marked():
    text = "U10-SIF-101: Does not meet its target: achieved PFDavg over the last 12 months " \
           "2.39e-02 is above"
    subject = email_subject(text)
    assert len(subject) <= 78 and subject.endswith("…")
    assert text.startswith(subject.removeprefix("[SIF Ledger] ").removesuffix("…"))
    assert subject.removesuffix("…").split()[-1] in text.split()
    assert email_subject("Short one") == "[SIF Ledger] Short one"
