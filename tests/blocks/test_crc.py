"""CRC-16/CCITT-FALSE against the published check value and a bitwise reference."""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from blocks._crc import crc16_ccitt_false


def bitwise_crc16(data: bytes, poly: int = 0x1021, init: int = 0xFFFF) -> int:
    """Slow reference: one shift per message bit, MSB first (Williams' "simple" algorithm)."""
    reg = init
    for byte in data:
        for k in range(7, -1, -1):
            feedback = ((reg >> 15) & 1) ^ ((byte >> k) & 1)
            reg = (reg << 1) & 0xFFFF
            if feedback:
                reg ^= poly
    return reg


def test_catalogue_check_value():
    # G. Cook, "Catalogue of parametrised CRC algorithms", CRC-16/IBM-3740 alias
    # CRC-16/CCITT-FALSE: check = 0x29B1 for the ASCII bytes "123456789".
    assert crc16_ccitt_false(b"123456789") == 0x29B1


def test_empty_message_is_the_initial_register():
    # Williams' parametrised model: with no input and xorout 0 the result is init (0xFFFF).
    assert crc16_ccitt_false(b"") == 0xFFFF


def test_naive_reference_gives_the_catalogue_value():
    # Guards the reference itself against the same published check value.
    assert bitwise_crc16(b"123456789") == 0x29B1


@given(st.binary(max_size=300))
def test_matches_bitwise_reference(data):
    assert crc16_ccitt_false(data) == bitwise_crc16(data)


@given(st.binary(min_size=1, max_size=100))
def test_message_followed_by_its_crc_leaves_zero(data):
    # Property of a CRC with no final XOR and no reflection (common practice): appending the
    # CRC MSB first makes the register end at zero.
    crc = crc16_ccitt_false(data)
    assert crc16_ccitt_false(data + crc.to_bytes(2, "big")) == 0


def test_uint8_array_equals_bytes():
    rng = np.random.default_rng(3)
    arr = rng.integers(0, 256, 77, dtype=np.uint8)
    assert crc16_ccitt_false(arr) == crc16_ccitt_false(arr.tobytes())
    assert crc16_ccitt_false(arr[::2]) == bitwise_crc16(arr[::2].tobytes())


@pytest.mark.parametrize("bad", [np.zeros(4, np.int16), np.zeros((2, 2), np.uint8)])
def test_rejects_arrays_that_are_not_bytes(bad):
    with pytest.raises(TypeError, match="1-D uint8"):
        crc16_ccitt_false(bad)
