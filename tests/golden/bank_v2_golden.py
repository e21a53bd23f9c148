#!/usr/bin/env python3
"""Writes the version 2 worked example of core/FORMAT.md from its parameters, independently of the
Rust encoder (only the Python standard library: struct for IEEE-754 floats, zlib.crc32 for the
CRC-32/ISO-HDLC), and prints its bytes as hex. tests/tests/golden_blob.rs pins the same bytes;
running this script and comparing is the outside check of the layout and of the CRC.

    python3 tests/golden/bank_v2_golden.py
"""
import struct
import zlib


def varint(v):
    out = bytearray()
    while True:
        b = v & 0x7F
        v >>= 7
        if v:
            out.append(b | 0x80)
        else:
            out.append(b)
            return bytes(out)


def f32(*vs):
    return b"".join(struct.pack("<f", v) for v in vs)


names = ["pump_flow"]
digest = zlib.crc32("".join(n + "\n" for n in names).encode("utf-8"))

modes = [
    # offset, scale, mean, W lower triangle row by row, alarm, clear
    ([2.5, 0.0], [4.0, 2.0], [0.0, 0.0], [1.0, 0.25, 1.0], 9.2103, 5.9915),
    ([3.0, 0.0], [8.0, 1.0], [0.125, 0.0], [1.0, -0.5, 1.5], 9.2103, 5.9915),
]

body = bytearray()
body += varint(0x00C0FFEE)  # model_id
body += varint(1_767_225_600)  # trained_at, 2026-01-01T00:00:00Z
body += varint(4)  # sequence
body += varint(0b1)  # log_mask: the window mean of feature 0 is log-transformed
body += struct.pack("<I", digest)  # names_digest, 4 bytes
body += bytes([1, len(modes), 4, 0b11])  # select known, K, w, options: differences + drift
for offset, scale, mean, w, alarm, clear in modes:
    body += f32(*offset) + f32(*scale) + f32(*mean) + f32(*w) + f32(alarm, clear)
body += f32(0.0625) + f32(0.125, 0.5)  # drift rate, bounds
body += varint(3) + varint(300)  # raise_after, clear_after

length = 10 + len(body) + 4
head = b"ELSD" + bytes([2, 1, 0, 0]) + struct.pack("<H", length)
blob = head + bytes(body)
blob += struct.pack("<I", zlib.crc32(blob))
print("names_digest", hex(digest))
print("length", len(blob))
print("crc", hex(zlib.crc32(blob[:-4])))
print(blob.hex())
