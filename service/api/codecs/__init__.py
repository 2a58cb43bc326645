"""Request decoders (rows JSON, columnar JSON, Arrow IPC) and response encoders."""
