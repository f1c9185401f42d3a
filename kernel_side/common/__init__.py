"""Helpers every room shares: input checks and the thread policy."""
