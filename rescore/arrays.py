"""The numpy array type aliases every module annotates with (one home for them)."""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]
I64 = npt.NDArray[np.int64]
U64 = npt.NDArray[np.uint64]
B = npt.NDArray[np.bool_]
