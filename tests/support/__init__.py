"""Shared test helpers: real processes on 127.0.0.1 (the service under gunicorn, an S3-compatible
server) and a bounded load generator.

Every wait is a bounded loop, every process is started in its own process group and stopped by
whoever started it (SIGTERM, then SIGKILL after a grace period).  Import from tests as
``from tests.support.processes import ...`` (pytest's ``pythonpath = ["."]`` puts the
repository root on ``sys.path``).
"""
