"""Independent implementation of the seeded index set and the wire-format test frames.

Written from docs/wire-format.md alone (not from the Rust code) and run once to produce the
test vectors in that document and in tests/wire.rs:

    python3 tests/python/wire_vectors.py
"""
import hashlib
import hmac
import struct
import zlib

M64 = (1 << 64) - 1
MULT = 6364136223846793005


class Pcg32:
    def __init__(self, initstate, initseq):
        self.state = 0
        self.inc = ((initseq << 1) | 1) & M64
        self.next()
        self.state = (self.state + initstate) & M64
        self.next()

    def next(self):
        old = self.state
        self.state = (old * MULT + self.inc) & M64
        xs = (((old >> 18) ^ old) >> 27) & 0xFFFFFFFF
        rot = old >> 59
        return ((xs >> rot) | (xs << ((-rot) & 31))) & 0xFFFFFFFF

    def bounded(self, bound):
        threshold = ((1 << 32) - bound) % bound
        while True:
            r = self.next()
            if r >= threshold:
                return r % bound


def sample_indices(seed, n, m):
    rng = Pcg32(seed, 54)
    out = []
    t = 0
    while len(out) < m:
        if rng.bounded(n - t) < m - len(out):
            out.append(t)
        t += 1
    return out


def varint(v):
    out = bytearray()
    while v >= 0x80:
        out.append((v & 0x7F) | 0x80)
        v >>= 7
    out.append(v)
    return bytes(out)


MAGIC = bytes([0xC5, 0x53, 0x47, 0x57])


def window(node, channel, units, bits, capture, seq, rate, n, hop, t0, scale, coding, indices,
           seed, values, f32=False, key=None):
    m = len(indices)
    if coding == 0:
        block = b"".join(varint(i if k == 0 else i - indices[k - 1]) for k, i in enumerate(indices))
    elif coding == 1:
        bm = bytearray((n + 7) // 8)
        for i in indices:
            bm[i // 8] |= 1 << (i % 8)
        block = bytes(bm)
    else:
        block = struct.pack("<Q", seed)
    vals = b"".join(struct.pack("<f" if f32 else "<h", v) for v in values)
    flags = coding | (4 if f32 else 0) | (8 if key else 0)
    length = 72 + len(block) + len(vals) + (16 if key else 0) + 4
    body = struct.pack("<IHBBIQdIIqdII", node, channel, units, bits, capture, seq, rate, n, hop,
                       t0, scale, m, len(block))
    frame = MAGIC + struct.pack("<IBBH", length, 1, 1, flags) + body + block + vals
    if key:
        frame += hmac.new(key, frame, hashlib.sha256).digest()[:16]
    return frame + struct.pack("<I", zlib.crc32(frame))


def ack(node, channel, capture, seq):
    frame = MAGIC + struct.pack("<IBBHIHHIQ", 36, 1, 2, 0, node, channel, 0, capture, seq)
    return frame + struct.pack("<I", zlib.crc32(frame))


def advice(node, channel, m, key=None):
    """Control frame (kind 3), message type 1 (sampling advice), TLV tag 1 = m (u32)."""
    body = struct.pack("<IHBB", node, channel, 1, 0) + struct.pack("<BBI", 1, 4, m)
    length = 12 + len(body) + (16 if key else 0) + 4
    frame = MAGIC + struct.pack("<IBBH", length, 1, 3, 0x0008 if key else 0) + body
    if key:
        frame += hmac.new(key, frame, hashlib.sha256).digest()[:16]
    return frame + struct.pack("<I", zlib.crc32(frame))


if __name__ == "__main__":
    g = Pcg32(42, 54)
    print("pcg32(42, 54):", [hex(g.next()) for _ in range(6)])
    for seed, n, m in [(1, 64, 8), (42, 4096, 10), (0xDEADBEEF, 16, 4)]:
        print(f"sample_indices({seed:#x}, {n}, {m}) =", sample_indices(seed, n, m))
    print("crc32('123456789') =", hex(zlib.crc32(b"123456789")))
    t0 = 1_700_000_000_000_000
    f1 = window(7, 1, 1, 12, 0x0A0B0C0D, 3, 25600.0, 64, 32, t0, 0.001, 0,
                [2, 3, 10, 40, 63], 0, [100, -100, 2047, -2048, 0])
    f2 = window(9, 0, 4, 16, 1, 0, 48000.0, 16, 16, t0 + 500, 0.5, 2,
                sample_indices(0xDEADBEEF, 16, 4), 0xDEADBEEF, [0.25, -1.5, 3.0, 1e-3], f32=True)
    key = bytes(range(16))
    idx3 = [0, 5, 9, 14, 15, 20, 27, 31]
    f3 = window(11, 2, 2, 16, 77, 1000, 10000.0, 32, 16, t0 + 3_200_000, 1.0 / 16384, 1,
                idx3, 0, [1, 2, 3, 4, -1, -2, -3, -4], key=key)
    f4 = ack(7, 1, 0x0A0B0C0D, 3)
    print("seeded frame indices:", sample_indices(0xDEADBEEF, 16, 4))
    f5 = advice(7, 1, 512)
    f6 = advice(11, 2, 384, key=key)
    for name, f in [("varint", f1), ("seeded", f2), ("bitmap+auth", f3), ("ack", f4),
                    ("advice", f5), ("advice+auth", f6)]:
        print(name, len(f), f.hex())
