"""Hamiltonian Monte Carlo: sampler, step-size and metric adaptation, network density, fit, diagnostics."""
