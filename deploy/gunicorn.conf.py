"""gunicorn configuration of choicecast (``choicecast serve`` runs gunicorn with this file).

Tuned for a 2-core pod (deploy/k8s/deployment.yaml: 2 CPU, 3 GiB); the full reasoning is in
docs/production.md, "Why these gunicorn settings":
- workers = 2, sync, no threads: scoring is CPU-bound NumPy work, one process per core; more
  processes or threads add memory and contention, not throughput. Scale out with pods.
- preload_app = False: the store client, compiled models and routing poller are per process,
  built after the fork (so a HUP also reloads code).
- timeout = 60 s bounds a stuck request; graceful_timeout = 20 s lets in-flight requests finish
  on SIGTERM (preStop 10 s + 20 s < terminationGracePeriodSeconds 45 s).
- graceful reload: ``kill -HUP <master>`` on a host; a rolling update in Kubernetes.
- the maximum request body is enforced by the app (CHOICECAST_MAX_BODY_BYTES -> 413), before
  the body is read when Content-Length declares it; gunicorn keeps its request-line and header
  limits.

The settings and hooks live in the package (service/api/gunicorn_config.py) so that an
installed, non-editable package runs with the same ones; override any of them below.
"""

from service.api.gunicorn_config import *  # noqa: F403
from service.api.gunicorn_config import child_exit, on_exit, post_worker_init  # noqa: F401  (hooks)
