"""attractorfit: discrete attractor states in delay-period population activity.

Read spike trains from open formats, estimate latent states and their vertex codes,
fit a low-rank spiking network whose attractors sit where the data's states sit,
generate surrogate recordings from it and compare model and data.
"""

from attractorfit.errors import InputError, InputWarning
from attractorfit.io import load
from attractorfit.recording import Recording
from attractorfit.binning import BinnedCounts, bin_spikes

__version__ = "0.1.0"

__all__ = ["InputError", "InputWarning", "Recording", "BinnedCounts", "bin_spikes", "load",
           "__version__"]
