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

# vertex codes, segments, the state analysis and the discreteness test
from attractorfit.states._vertices import (VertexCodes, assign_vertex_codes,  # noqa: E402
                                           codes_from_feature_model, codes_to_text, cube_r2)
from attractorfit.states._segments import (ConditionTable, Segments,  # noqa: E402
                                           StateDecoding, SurvivalCurve, decode_posteriors,
                                           kaplan_meier)
from attractorfit.states._analysis import StateFit, analyse_states  # noqa: E402
from attractorfit.states._discreteness import (ContinuousNull,  # noqa: E402
                                               DiscretenessResult, discreteness_test,
                                               fit_continuous_null)

__all__ += [
    "VertexCodes", "assign_vertex_codes", "codes_from_feature_model", "codes_to_text",
    "cube_r2", "ConditionTable", "Segments", "StateDecoding", "SurvivalCurve",
    "decode_posteriors", "kaplan_meier", "StateFit", "analyse_states", "ContinuousNull",
    "DiscretenessResult", "discreteness_test", "fit_continuous_null",
]

# Amendment 7: end-of-window decoding, robustness panel, drift of state use
from attractorfit.states._end_state import (EndStateDecoding,  # noqa: E402
                                            centroid_permutation_test, decode_end_state,
                                            end_state_features, stratified_folds)
from attractorfit.states._robustness import (RobustnessPanel,  # noqa: E402
                                             RobustnessSetting, StateDrift,
                                             chi_square_homogeneity, match_states,
                                             state_drift, state_robustness)

__all__ += [
    "EndStateDecoding", "centroid_permutation_test", "decode_end_state",
    "end_state_features", "stratified_folds", "RobustnessPanel", "RobustnessSetting",
    "StateDrift", "chi_square_homogeneity", "match_states", "state_drift",
    "state_robustness",
]
