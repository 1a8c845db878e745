"""The service loop and its wiring from a config."""
