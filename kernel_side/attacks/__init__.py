"""Attacks on the posterior predictive: the problem, gradient and gradient-free methods, read-outs, masking check."""
