"""Publishes versions k0, k1, ... of the ferry model until killed (for the kill test).

python publish_worker.py STORE_DIR START
"""

from __future__ import annotations

import sys

from store_cases import publish_ferry

from model_store import open_store

if __name__ == "__main__":
    store = open_store(sys.argv[1])
    for i in range(int(sys.argv[2]), 100_000):
        publish_ferry(store, f"k{i}", shift=i * 1e-3)
