"""What every local worker needs before its first task, done once in the fork server.

:class:`pipeline.batch.executors.ProcessExecutor` has the fork server import this module; each
worker is then forked from it with the stages imported and xarray's one-time look for optional
array libraries done (about a second of CPU per worker otherwise, paid again by every worker).
"""

import numpy as np
import xarray as xr

import pipeline.tasks  # noqa: F401

xr.Variable(("x",), np.zeros(1))
