"""IEEE 488.2 arbitrary block data (definite ``#<n><len><bytes>`` and indefinite ``#0...``).

Definite form (IEEE 488.2 §8.7.9): ``#`` then one digit n (1-9) giving the number of length
digits, then n digits giving the byte count L, then L bytes. Indefinite form (§8.7.10): ``#0``
then bytes up to the final newline sent with END; only safe on transports that carry END.

The parser refuses anything it cannot account for: a short payload, a non-digit length, a
payload whose size is not a whole number of values. A wrong trace is worse than no trace.
"""

from __future__ import annotations

import numpy as np

from bench.errors import BlockFormatError, ReplyFormatError

__all__ = ["parse_block", "encode_block", "decode_float32", "decode_binary", "decode_ascii",
           "BINARY_DTYPES"]

#: numpy type of one value of each binary trace format (byte order added when decoding):
#: IEEE 754 binary32 and binary64, two's-complement 32-bit integers.
BINARY_DTYPES = {"real32": "f4", "real64": "f8", "int32": "i4"}


def parse_block(data: bytes, *, allow_trailing: bool = True) -> tuple[bytes, int]:
    """Parse one block at the start of ``data``.

    Parameters
    ----------
    data : bytes
        Raw bytes as read from the instrument, starting at ``#``.
    allow_trailing : bool
        Accept bytes after a definite block (usually a terminating ``\\n``).

    Returns
    -------
    payload : bytes
        The block's data bytes.
    consumed : int
        Bytes of ``data`` used, header included (trailing terminator not included).

    Raises
    ------
    BlockFormatError
        If the header is malformed or the payload is truncated.
    """
    if len(data) < 2 or data[:1] != b"#":
        raise BlockFormatError(f"expected an IEEE 488.2 block starting with '#', found {data[:8]!r}")
    n_char = data[1:2]
    if not n_char.isdigit():
        raise BlockFormatError(f"expected a digit after '#', found {n_char!r}")
    n_digits = int(n_char)
    if n_digits == 0:
        # Indefinite block: everything up to the final newline.
        body = data[2:]
        if not body.endswith(b"\n"):
            raise BlockFormatError("indefinite block (#0) not terminated by a newline")
        return body[:-1], len(data) - 1
    header_end = 2 + n_digits
    length_text = data[2:header_end]
    if len(length_text) < n_digits or not length_text.isdigit():
        raise BlockFormatError(
            f"expected {n_digits} length digits after '#{n_digits}', found {length_text!r}"
        )
    length = int(length_text)
    end = header_end + length
    if len(data) < end:
        raise BlockFormatError(
            f"block truncated: header announces {length} bytes, {len(data) - header_end} arrived"
        )
    if not allow_trailing and len(data) != end:
        raise BlockFormatError(f"{len(data) - end} unexpected bytes after the block")
    return data[header_end:end], end


def encode_block(payload: bytes) -> bytes:
    """Wrap ``payload`` in a definite-length block header (no terminator)."""
    length = str(len(payload)).encode()
    if len(length) > 9:
        raise BlockFormatError(f"payload of {len(payload)} bytes is too long for a definite block")
    return b"#" + str(len(length)).encode() + length + payload


def decode_float32(payload: bytes, *, big_endian: bool, expected_points: int | None = None) -> np.ndarray:
    """Decode REAL,32 payload into a native little-endian float32 array.

    Parameters
    ----------
    payload : bytes
        Block data bytes.
    big_endian : bool
        True for ``FORM:BORD NORM`` (the SCPI default), False for ``SWAP``.
    expected_points : int, optional
        If given, the number of values the sweep must have.
    """
    if len(payload) % 4:
        raise BlockFormatError(f"REAL,32 block of {len(payload)} bytes is not a multiple of 4")
    values = np.frombuffer(payload, dtype=">f4" if big_endian else "<f4").astype("<f4")
    if expected_points is not None and values.size != expected_points:
        raise BlockFormatError(f"expected {expected_points} trace points, found {values.size}")
    if not np.all(np.isfinite(values)):
        raise BlockFormatError("trace holds non-finite values (NaN or Inf): wrong byte order or corrupt data")
    return values


def decode_binary(payload: bytes, kind: str, *, big_endian: bool) -> np.ndarray:
    """Decode block data of one binary format into float64 values (no range check).

    Parameters
    ----------
    payload : bytes
        Block data bytes.
    kind : str
        ``"real32"``, ``"real64"`` or ``"int32"`` (:data:`BINARY_DTYPES`).
    big_endian : bool
        True for ``FORM:BORD NORM`` (SCPI-1999 FORMat:BORDer), False for ``SWAP``.

    Raises
    ------
    BlockFormatError
        When the payload is not a whole number of values.
    """
    dtype = np.dtype(BINARY_DTYPES[kind]).newbyteorder(">" if big_endian else "<")
    if len(payload) % dtype.itemsize:
        raise BlockFormatError(f"{kind} block of {len(payload)} bytes is not a multiple of {dtype.itemsize}")
    with np.errstate(invalid="ignore"):  # bytes read in the wrong order may spell signalling NaNs
        return np.frombuffer(payload, dtype=dtype).astype(np.float64)


def decode_ascii(data: bytes, *, separator: str = ",") -> np.ndarray:
    """Decode an ASCII list of numbers (``-50.25,-49.5,...``, SCPI NR1/NR2/NR3) into float64.

    Raises
    ------
    ReplyFormatError
        When an item is not a number.
    """
    text = data.decode("ascii", errors="replace").strip()
    if not text:
        return np.zeros(0)
    items = text.split(separator)
    try:
        return np.array([float(item) for item in items], dtype=np.float64)
    except ValueError:
        bad = next(item for item in items if not _is_number(item))
        raise ReplyFormatError(f"expected numbers separated by {separator!r}, found {bad.strip()[:20]!r}") from None


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True
