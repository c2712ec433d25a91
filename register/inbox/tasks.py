"""The e-mail of one notification as a Celery task, retried with exponential backoff."""

from celery import shared_task


@shared_task(name="register.send_notification_email", bind=True, acks_late=True,
             max_retries=None)
def send_notification_email(self, note_id: int) -> bool:
    """Send the e-mail of notification ``note_id`` (``register.inbox.delivery.send_one``);
    when the mail server does not accept it, retry after ``retry_delay`` while attempts
    are left (``EMAIL_MAX_ATTEMPTS``, counted on the notification)."""
    from register.inbox.delivery import EmailNotSent, attempts_left, retry_delay, send_one

    try:
        return send_one(note_id)
    except EmailNotSent as exc:
        if not attempts_left(note_id):
            return False
        raise self.retry(exc=exc, countdown=retry_delay(self.request.retries)) from None
