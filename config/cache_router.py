"""Django's database cache on its own connection (alias "cache", config/settings/base.py)."""

CACHE_ALIAS = "cache"


class CacheRouter:
    """The cache's table lives on the "cache" alias; nothing else does."""

    @staticmethod
    def _is_cache(model) -> bool:
        return model._meta.app_label == "django_cache"

    def db_for_read(self, model, **hints):
        return CACHE_ALIAS if self._is_cache(model) else None

    def db_for_write(self, model, **hints):
        return CACHE_ALIAS if self._is_cache(model) else None

    def allow_migrate(self, db, app_label, model_name=None, **hints):
        if app_label == "django_cache":
            return db == CACHE_ALIAS
        return None if db != CACHE_ALIAS else False


def create_cache_table(sender, using="default", **kwargs):
    """After ``migrate`` (post_migrate, once: for the register app on the default
    database): the database cache's table on its alias, when the settings have one; else
    on the database just migrated, so a process started on the default settings against
    the same database (a Celery worker beside the test suite) finds its cache table."""
    from django.conf import settings
    from django.core.management import call_command
    from django.core.management.commands.createcachetable import Command

    if sender.name != "register" or using != "default":
        return
    if CACHE_ALIAS in settings.DATABASES:
        call_command("createcachetable", database=CACHE_ALIAS, verbosity=0)
    else:
        cmd = Command()
        cmd.verbosity = 0
        cmd.create_table(using, settings.CACHE_TABLE, dry_run=False)
