"""Trace replies of the simulated analyzer in every format it offers.

``FORMat[:DATA]`` (SCPI-1999 Vol. 2, FORMat subsystem):

* ``ASCii``: comma-separated numbers, 8 significant digits;
* ``REAL,32`` / ``REAL,64``: IEEE 754 binary32 / binary64 in an IEEE 488.2 definite block;
* ``INTeger,32``: two's-complement 32-bit integers counting :data:`INT32_COUNTS_PER_DB` per dB
  (this simulated instrument's scale), in a definite block.

``FORMat:BORDer`` orders the bytes of the binary formats: ``NORMal`` is big-endian (most
significant byte first, the reset default), ``SWAPped`` little-endian.
"""

from __future__ import annotations

import numpy as np

from bench.ieee488 import encode_block

__all__ = ["INT32_COUNTS_PER_DB", "encode_trace"]

#: Counts per dB of an ``INT,32`` trace value (so a profile reads it with scale = 0.001 dB).
INT32_COUNTS_PER_DB = 1000

_INT32_LIMIT = 2**31 - 1


def encode_trace(values: np.ndarray, data_format: str, byte_order: str) -> bytes:
    """The reply to ``TRACe[:DATA]?`` for ``values`` (dBm or dBuV).

    Parameters
    ----------
    values : numpy.ndarray
        Trace levels.
    data_format : str
        ``"ASC"``, ``"REAL,32"``, ``"REAL,64"`` or ``"INT,32"``.
    byte_order : str
        ``"NORM"`` (big-endian) or ``"SWAP"`` (little-endian).

    Returns
    -------
    bytes
        The data without the line terminator.
    """
    if data_format == "ASC":
        return ",".join(format(v, ".8g") for v in values.tolist()).encode("ascii")
    order = ">" if byte_order == "NORM" else "<"
    if data_format == "INT,32":
        counts = np.clip(np.round(values * INT32_COUNTS_PER_DB), -_INT32_LIMIT - 1, _INT32_LIMIT)
        return encode_block(counts.astype(f"{order}i4").tobytes())
    width = 4 if data_format == "REAL,32" else 8
    return encode_block(values.astype(f"{order}f{width}").tobytes())
