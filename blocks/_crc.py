"""CRC-16/CCITT-FALSE, the frame check of phasefree packets.

Parameters of the algorithm in the Williams/Rocksoft model [1]_ as listed in the CRC
catalogue [2]_: width 16, polynomial 0x1021 (x^16 + x^12 + x^5 + 1), initial register 0xFFFF,
no reflection of input bytes or of the result, final XOR 0x0000; check value 0x29B1 for the
nine ASCII bytes ``b"123456789"``.

The standard library's ``binascii.crc_hqx`` computes exactly this register update (polynomial
0x1021, MSB-first, caller-chosen initial value, no final XOR) in C with a 256-entry table, so
it is used as the engine rather than a hand-written table loop.

References
----------
.. [1] R. N. Williams, "A painless guide to CRC error detection algorithms", 1993
   (the parametrised model: width, poly, init, refin, refout, xorout, check).
.. [2] G. Cook, "Catalogue of parametrised CRC algorithms", entry CRC-16/IBM-3740
   (alias CRC-16/CCITT-FALSE).
"""

from __future__ import annotations

import binascii

import numpy as np

__all__ = ["CRC16_CCITT_FALSE_INIT", "CRC16_CCITT_FALSE_POLY", "crc16_ccitt_false"]

#: Generator polynomial (x^16 implied): x^16 + x^12 + x^5 + 1.
CRC16_CCITT_FALSE_POLY = 0x1021
#: Register value before the first byte.
CRC16_CCITT_FALSE_INIT = 0xFFFF


def crc16_ccitt_false(data: bytes | bytearray | memoryview | np.ndarray) -> int:
    """CRC-16/CCITT-FALSE of a byte string.

    Parameters
    ----------
    data : bytes-like or numpy.ndarray
        The message. An array must be one-dimensional with dtype uint8 (one byte per element).

    Returns
    -------
    int
        The 16-bit CRC, 0 .. 0xFFFF. Sent MSB first after the message, it makes the CRC of
        message + CRC equal to zero (no final XOR).

    Raises
    ------
    TypeError
        If ``data`` is an array that is not 1-D uint8.

    Notes
    -----
    Register update per byte ``b`` (MSB first, no reflection) [1]_:
    ``crc = (crc << 8) ^ T[(crc >> 8) ^ b]`` with ``T`` the table of the polynomial 0x1021,
    starting from 0xFFFF.

    References
    ----------
    .. [1] G. Cook, "Catalogue of parametrised CRC algorithms", CRC-16/IBM-3740
       (CRC-16/CCITT-FALSE): poly 0x1021, init 0xFFFF, refin/refout false, xorout 0,
       check 0x29B1.

    Examples
    --------
    >>> hex(crc16_ccitt_false(b"123456789"))
    '0x29b1'
    """
    if isinstance(data, np.ndarray):
        if data.ndim != 1 or data.dtype != np.uint8:
            raise TypeError(f"data must be a 1-D uint8 array (got {data.ndim}-D {data.dtype})")
        data = np.ascontiguousarray(data).tobytes()
    return binascii.crc_hqx(data, CRC16_CCITT_FALSE_INIT)
