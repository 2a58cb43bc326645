"""gunicorn configuration of choicecast (``choicecast serve`` runs gunicorn with this file).

The settings and hooks live in the package (service/api/gunicorn_config.py) so that an
installed, non-editable package runs with the same ones; override any of them below.
"""

from service.api.gunicorn_config import *  # noqa: F403
from service.api.gunicorn_config import child_exit, on_exit, post_worker_init  # noqa: F401  (hooks)
