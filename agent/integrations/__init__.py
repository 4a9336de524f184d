"""Adapters from training frameworks to the probe. Each imports its framework itself, so ``import agent``
never pulls one in."""
