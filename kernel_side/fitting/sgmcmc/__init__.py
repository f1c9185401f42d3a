"""Stochastic-gradient MCMC (SGLD, SGHMC) with a cyclical step size: the kernel and the network fit."""
