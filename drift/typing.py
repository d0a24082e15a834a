"""Array aliases and option sets used across drift."""

from __future__ import annotations

from typing import Literal

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
BoolArray = npt.NDArray[np.bool_]

Frequency = Literal["D", "W", "M", "Q"]
DriverForm = Literal["lagged", "forecast", "known"]
Action = Literal["refit", "relag", "drop-driver", "data-late", "watch"]
Level = float  # a significance level such as 0.10, 0.05, 0.01
