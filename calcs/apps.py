from django.apps import AppConfig


class CalcsConfig(AppConfig):
    default_auto_field = "django.db.models.BigAutoField"
    name = "calcs"
    verbose_name = "Calculations"

    def ready(self):
        # Register the calcs tasks in every process, so the register can enqueue them by
        # name ("calcs.recompute_sif") without importing calcs.
        from calcs import tasks  # noqa: F401
