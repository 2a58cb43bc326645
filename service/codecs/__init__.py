"""Codecs between tabular files or streams and the core's :class:`~service.choice.Batch`."""
