"""Low-rank LIF networks: simulator, transfer function, hypercube attractors, decoders.

The network (:class:`LowRankNetwork`) has N leaky integrate-and-fire neurons whose
recurrent weights ``W = E D`` act only through a K-dimensional readout ``y``; the
compiled simulator costs O(N K) per step. The rate picture (Siegert transfer function at
the simulator's step) gives fixed points, Jacobians and margins; decoder rules place the
fixed points on hypercube vertices; the capacity module measures retrieval.
"""

from attractorfit.network._capacity import (
    BinaryCapacity,
    CapacityResult,
    CompletionResult,
    binary_capacity,
    binary_recall,
    capacity_sweep,
    overlaps,
    pattern_completion,
)
from attractorfit.network._decoders import (
    DecoderResult,
    decoder_hebbian,
    decoder_optimized,
    decoder_pseudoinverse,
    readout_sd,
    vertex_margins,
)
from attractorfit.network._hypercube import (
    VertexPatterns,
    encoder_axes,
    hypercube_encoder,
    vertex_codes,
    vertex_patterns,
)
from attractorfit.network._model import LowRankNetwork, SimulationResult
from attractorfit.network._stability import (
    FixedPoints,
    fixed_points,
    jacobian_at,
    rate_flow,
    readout_noise_ratio,
    stability_margin,
)
from attractorfit.network._transfer import (
    siegert_rate,
    siegert_slope,
    transfer_inverse,
    transfer_rate,
    transfer_slope,
)

__all__ = [
    "LowRankNetwork", "SimulationResult",
    "siegert_rate", "siegert_slope", "transfer_rate", "transfer_slope", "transfer_inverse",
    "hypercube_encoder", "encoder_axes", "vertex_codes", "vertex_patterns", "VertexPatterns",
    "DecoderResult", "decoder_hebbian", "decoder_pseudoinverse", "decoder_optimized",
    "readout_sd", "vertex_margins",
    "FixedPoints", "fixed_points", "jacobian_at", "stability_margin", "rate_flow",
    "readout_noise_ratio",
    "overlaps", "pattern_completion", "CompletionResult", "capacity_sweep", "CapacityResult",
    "binary_recall", "binary_capacity", "BinaryCapacity",
]
