"""Soak test of ``leadline run``: random SIGKILLs and broker restarts against a clean run (:mod:`.run`)."""
