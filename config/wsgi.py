import os

from django.core.wsgi import get_wsgi_application

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "config.settings.production")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # see config/celery.py
application = get_wsgi_application()
