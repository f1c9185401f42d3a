"""Makers of posteriors: MAP and deep ensembles, MC dropout, variational inference, Laplace, HMC."""
