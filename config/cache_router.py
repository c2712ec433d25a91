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
    database): the database cache's table on its alias, when the settings have one."""
    from django.conf import settings
    from django.core.management import call_command

    if sender.name == "register" and using == "default" and CACHE_ALIAS in settings.DATABASES:
        call_command("createcachetable", database=CACHE_ALIAS, verbosity=0)
