"""Outputs: where alarm events go besides the store."""
