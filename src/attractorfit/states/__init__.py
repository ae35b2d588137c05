"""Discrete states of population activity: Poisson HMM, binary-feature (hypercube)
state model, vertex codes, occupancy and dwell times, and the discreteness test.

Stage 3 of the flow (binning -> latent/**states** -> network/fit).
"""

from attractorfit.states._hmm import PoissonHMM

__all__ = [
    "PoissonHMM",
]
