"""IEEE 488.2 arbitrary block parsing (IEEE 488.2 §8.7.9 definite, §8.7.10 indefinite)."""

import struct

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bench.errors import BlockFormatError
from bench.ieee488 import decode_float32, encode_block, parse_block


def test_reference_example_little_endian():
    # IEEE 488.2 8.7.9 (derived): b'#212' + struct.pack('<3f', -20.5, -30.25, -99.0) decodes to
    # the same values
    data = b"#212" + struct.pack("<3f", -20.5, -30.25, -99.0) + b"\n"
    payload, consumed = parse_block(data)
    assert consumed == 16
    assert decode_float32(payload, big_endian=False).tolist() == [-20.5, -30.25, -99.0]


def test_big_endian_ramp():
    # A known ramp catches a wrong byte order (pitfalls: pyvisa); NORMal = big-endian (SCPI FORMat:BORDer)
    ramp = np.arange(-100.0, -90.0, 0.5, dtype=np.float32)
    payload, _ = parse_block(encode_block(ramp.astype(">f4").tobytes()))
    out = decode_float32(payload, big_endian=True)
    assert out.dtype == np.dtype("<f4")
    np.testing.assert_array_equal(out, ramp)


def test_indefinite_form():
    body = struct.pack("<2f", 1.0, 2.0)
    payload, _ = parse_block(b"#0" + body + b"\n")
    assert decode_float32(payload, big_endian=False).tolist() == [1.0, 2.0]


def test_payload_may_contain_newline_bytes():
    # 488.2 blocks are length-delimited: a data byte equal to '\n' must not end the block
    values = np.array([np.frombuffer(b"\n\n\n\n", "<f4")[0], -1.0], dtype="<f4")
    payload, _ = parse_block(encode_block(values.tobytes()) + b"\n")
    np.testing.assert_array_equal(decode_float32(payload, big_endian=False), values)


@pytest.mark.parametrize(
    ("data", "fragment"),
    [
        (b"", "starting with '#'"),
        (b"212abc", "starting with '#'"),
        (b"#x12", "digit after '#'"),
        (b"#2a2" + b"x" * 12, "length digits"),
        (b"#3012" + b"x" * 11, "truncated"),
        (b"#0abcd", "not terminated"),
    ],
)
def test_malformed_headers(data, fragment):
    with pytest.raises(BlockFormatError, match=fragment):
        parse_block(data)


def test_wrong_size_and_nan_refused():
    with pytest.raises(BlockFormatError, match="multiple of 4"):
        decode_float32(b"\x00" * 6, big_endian=False)
    with pytest.raises(BlockFormatError, match="expected 3 trace points"):
        decode_float32(b"\x00" * 8, big_endian=False, expected_points=3)
    with pytest.raises(BlockFormatError, match="non-finite"):
        decode_float32(struct.pack("<f", float("nan")), big_endian=False)


@settings(max_examples=300, deadline=None)
@given(values=st.lists(st.floats(-200, 50, width=32), min_size=1, max_size=64),
       big=st.booleans(), cut=st.integers(min_value=1, max_value=300))
def test_fuzz_truncation_never_gives_a_wrong_trace(values, big, cut):
    arr = np.array(values, dtype=">f4" if big else "<f4")
    block = encode_block(arr.tobytes())
    truncated = block[: max(0, len(block) - cut)]
    try:
        payload, _ = parse_block(truncated)
        out = decode_float32(payload, big_endian=big, expected_points=len(values))
    except BlockFormatError:
        return
    # If no error, the trace must be exactly the original (never a silently wrong trace)
    np.testing.assert_array_equal(out, np.array(values, dtype="<f4"))


@settings(max_examples=300, deadline=None)
@given(values=st.lists(st.floats(-200, 50, width=32), min_size=1, max_size=32),
       pos=st.integers(min_value=0, max_value=6), byte=st.integers(0, 255))
def test_fuzz_corrupted_header(values, pos, byte):
    arr = np.array(values, dtype="<f4")
    block = bytearray(encode_block(arr.tobytes()))
    pos = min(pos, len(block) - 1)
    block[pos] = byte
    try:
        payload, _ = parse_block(bytes(block))
        out = decode_float32(payload, big_endian=False, expected_points=len(values))
    except BlockFormatError:
        return
    # A corrupted header that still parses must still yield exactly the declared size
    assert out.size == len(values)


@given(payload=st.binary(max_size=200))
def test_round_trip(payload):
    assert parse_block(encode_block(payload))[0] == payload
