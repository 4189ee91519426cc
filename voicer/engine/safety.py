"""The last stage before the speakers: non-finite samples out, level capped.

Audio can hurt ears and speakers. Every block passes through here:

1. non-finite samples (NaN, inf) are zeroed and counted; the renderer then resets the
   voices whose state went bad;
2. a soft limiter: samples below the knee (``knee_db`` under the ceiling) pass
   unchanged, louder ones are bent smoothly toward the ceiling
   (``knee + (ceiling - knee) tanh((|x| - knee) / (ceiling - knee))``: continuous in value
   and slope at the knee);
3. a hard clip at the ceiling (default -1 dBFS) as the guarantee.

It works sample by sample with no memory, so the result does not depend on the block
size, and it allocates nothing after construction.
"""

from __future__ import annotations

__all__ = ["SafetyStage", "DEFAULT_CEILING_DBFS"]

import math

import numpy as np
from numpy.typing import NDArray

from ..errors import ParameterError

DEFAULT_CEILING_DBFS = -1.0
#: Arguments of tanh above this give exactly 1.0 in float64.
_TANH_SATURATED = 40.0


class SafetyStage:
    """Soft limiter below a hard ceiling, with a non-finite guard.

    Parameters
    ----------
    max_block : int
        Longest block processed.
    ceiling_dbfs : float < 0
        Nothing leaves louder than this.
    knee_db : float > 0
        The limiter starts bending this far below the ceiling.
    """

    def __init__(self, max_block: int, *, ceiling_dbfs: float = DEFAULT_CEILING_DBFS, knee_db: float = 6.0) -> None:
        if not ceiling_dbfs < 0:
            raise ParameterError(f"ceiling_dbfs={ceiling_dbfs} must be below 0 dBFS")
        if not knee_db > 0:
            raise ParameterError(f"knee_db={knee_db} must be > 0")
        self.ceiling = 10.0 ** (ceiling_dbfs / 20.0)
        self.knee = self.ceiling * 10.0 ** (-knee_db / 20.0)
        self.nonfinite = 0
        self.limited = 0  # samples bent by the limiter
        self.peak = 0.0  # largest magnitude of the last block, after the stage
        self._mag = np.zeros(max_block)
        self._over = np.zeros(max_block, dtype=bool)
        self._ok = np.zeros(max_block, dtype=bool)

    def process(self, x: NDArray[np.float64]) -> bool:
        """Make ``x`` safe in place; returns False if it held non-finite samples.

        ``peak`` is then the largest magnitude leaving.
        """
        n = len(x)
        mag = self._mag[:n]
        np.abs(x, out=mag)
        top = float(mag.max()) if n else 0.0
        clean = math.isfinite(top)
        if not clean:  # rare: find and zero the bad samples
            ok = self._ok[:n]
            np.isfinite(x, out=ok)
            self.nonfinite += int(n - np.count_nonzero(ok))
            np.logical_not(ok, out=ok)
            np.copyto(x, 0.0, where=ok)
            np.abs(x, out=mag)
            top = float(mag.max())
        if top > self.knee:
            over = self._over[:n]
            np.greater(mag, self.knee, out=over)
            self.limited += int(np.count_nonzero(over))
            span = self.ceiling - self.knee
            np.subtract(mag, self.knee, out=mag)
            # tanh is 1.0 in float64 from about 19.1 on: capping there first keeps a
            # huge sample (up to float64's maximum) from overflowing the division,
            # whose warning would be I/O inside the audio callback.
            np.minimum(mag, _TANH_SATURATED * span, out=mag)
            np.divide(mag, span, out=mag)
            np.tanh(mag, out=mag)
            np.multiply(mag, span, out=mag)
            np.add(mag, self.knee, out=mag)
            np.copysign(mag, x, out=mag)
            np.copyto(x, mag, where=over)
            np.clip(x, -self.ceiling, self.ceiling, out=x)
            top = min(self.knee + span * math.tanh((top - self.knee) / span), self.ceiling)
        self.peak = top
        return clean
