"""The HTTP shell: app factory, schemas, codecs, problem details, auth, metrics.

from service.api import create_app
app = create_app({"store": "/path/to/store"})
"""

from service.api.app import create_app

__all__ = ["create_app"]
