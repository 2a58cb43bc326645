"""The WSGI entry point gunicorn loads: ``service.api.wsgi:app`` (settings from the environment)."""

from service.api.app import create_app

app = create_app()
