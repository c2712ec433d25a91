from django.apps import AppConfig


class RegisterConfig(AppConfig):
    default_auto_field = "django.db.models.BigAutoField"
    name = "register"
    verbose_name = "SIF register"

    def ready(self):
        from simple_history.signals import post_create_historical_record

        from register.audit.chain import on_history

        post_create_historical_record.connect(on_history, dispatch_uid="register.audit.chain")

        from django.contrib.auth import get_user_model
        from django.db.models.signals import post_save, pre_save

        from register.accounts import tokens

        user_model = get_user_model()
        pre_save.connect(tokens.note_password_change, sender=user_model,
                         dispatch_uid="register.accounts.tokens.note")
        post_save.connect(tokens.revoke_on_password_change, sender=user_model,
                          dispatch_uid="register.accounts.tokens.revoke")

        from django.db.models.signals import post_migrate

        from config.cache_router import create_cache_table

        # wherever migrate runs, the shared cache's table is made (config/settings/base.py)
        post_migrate.connect(create_cache_table, sender=self,
                             dispatch_uid="config.cache_router.create_cache_table")
