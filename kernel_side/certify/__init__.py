"""Certified bounds on an ensemble's predictions: interval bound propagation and CROWN."""
