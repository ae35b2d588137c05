"""Low-rank LIF networks: simulator, transfer function, hypercube attractors, decoders."""

from attractorfit.network._model import LowRankNetwork, SimulationResult
from attractorfit.network._transfer import (
    siegert_rate,
    siegert_slope,
    transfer_inverse,
    transfer_rate,
    transfer_slope,
)

__all__ = ["LowRankNetwork", "SimulationResult", "siegert_rate", "siegert_slope",
           "transfer_rate", "transfer_slope", "transfer_inverse"]
