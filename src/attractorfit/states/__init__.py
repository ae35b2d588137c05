"""Discrete states of population activity: Poisson HMM, binary-feature (hypercube)
state model, vertex codes, occupancy and dwell times, and the discreteness test.

Stage 3 of the flow (binning -> latent/**states** -> network/fit).
"""

from attractorfit.states._hmm import PoissonHMM
from attractorfit.states._feature import (BinaryFeatureHMM, CubeComparison,
                                          compare_cube_vs_free, vertex_codes)
from attractorfit.states._select import StateCountChoice, choose_n_states

__all__ = [
    "PoissonHMM",
    "BinaryFeatureHMM",
    "CubeComparison",
    "compare_cube_vs_free",
    "vertex_codes",
    "StateCountChoice",
    "choose_n_states",
]
