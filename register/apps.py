from django.apps import AppConfig


class RegisterConfig(AppConfig):
    default_auto_field = "django.db.models.BigAutoField"
    name = "register"
    verbose_name = "SIF register"

    def ready(self):
        from . import signals  # noqa: F401
