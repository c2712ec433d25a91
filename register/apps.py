from django.apps import AppConfig


class RegisterConfig(AppConfig):
    default_auto_field = "django.db.models.BigAutoField"
    name = "register"
    verbose_name = "SIF register"

    def ready(self):
        from simple_history.signals import post_create_historical_record

        from register.audit.chain import on_history

        post_create_historical_record.connect(on_history, dispatch_uid="register.audit.chain")
