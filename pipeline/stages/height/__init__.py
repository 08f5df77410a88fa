"""Height reconstruction: tunnelling current or feedback signal → height map, uncertainty, flags.

Constant-height frames are converted through the barrier-decay law, constant-current frames are
the piezo z plus the feedback-error correction from the residual current (DESIGN.md §6). Both
traces of a line are aligned by their measured lag and averaged where they agree. The white
noise of every channel is measured on the frame itself, so the reported uncertainty does not
depend on a number typed into a config file.
"""

from pipeline.stages.height.noise import NoiseEstimate, estimate_white_noise
from pipeline.stages.height.reconstruct import reconstruct_height
from pipeline.stages.height.traces import estimate_trace_lag

__all__ = [
    "NoiseEstimate",
    "estimate_trace_lag",
    "estimate_white_noise",
    "reconstruct_height",
]
