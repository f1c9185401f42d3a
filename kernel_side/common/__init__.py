"""Helpers every room shares: input checks, the thread policy, progress bars, axis ticks."""
