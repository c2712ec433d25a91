from django.apps import AppConfig


class CalcsConfig(AppConfig):
    default_auto_field = "django.db.models.BigAutoField"
    name = "calcs"
    verbose_name = "Calculations"
