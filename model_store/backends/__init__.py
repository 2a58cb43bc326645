"""Storage backends behind one small interface (:class:`~model_store.backends.base.Backend`)."""
