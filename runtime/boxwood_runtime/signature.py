"""Ed25519 signature verification (RFC 8032, section 5.1.7), standard library only.

The box checks a signed bundle with this module alone: Python 3.8 syntax, no third-party
package, and it also runs under MicroPython (big integers and three-argument ``pow`` are
all it needs). Signing happens on the workstation (``boxwood keygen`` / ``boxwood bundle
--sign``, with the ``cryptography`` package); this side only verifies.

    from boxwood_runtime.signature import verify
    verify(public_key_32_bytes, message, signature_64_bytes)   # -> True / False

What it follows, step by step (RFC 8032):

* 5.1.3 decoding: a point is 32 bytes, little-endian ``y`` with the sign of ``x`` in the
  top bit; ``y >= p`` is refused, and so is ``x = 0`` with the sign bit set (the two
  non-canonical encodings), and a ``y`` with no ``x`` on the curve.
* 5.1.7 verification: ``S`` (the second half of the signature) must be below the group
  order ``L`` (a non-canonical ``S >= L`` is refused), ``k = SHA-512(R || A || M) mod L``,
  and the group equation ``[8][S]B = [8]R + [8][k]A'`` must hold (the cofactored form the
  RFC states first).
* 5.1.4 point arithmetic in extended homogeneous coordinates.

SHA-512 comes from ``hashlib`` where it has one; MicroPython's ``hashlib`` has SHA-256
only, so :func:`sha512` falls back to :class:`Sha512`, written from FIPS 180-4 section
6.4 (its round constants and initial value are computed from their definitions in
sections 4.2.3 and 5.3.5, cube and square roots of the first primes, not typed in).

Keys in files: :func:`public_key_from_pem` reads a PEM ``PUBLIC KEY`` (the
SubjectPublicKeyInfo that ``cryptography`` and OpenSSL write for Ed25519: a fixed
12-byte DER prefix and the 32 key bytes). Several keys may sit in one file (a trust file
listing the keys a device accepts).

Timing: this verifies public data with public keys; it is not written to be constant-time,
and need not be (there is no secret on the box).
"""
try:
    import hashlib
except ImportError:  # MicroPython builds without hashlib
    hashlib = None
import binascii  # MicroPython 1.2x has it under this name too

__all__ = ["verify", "sha512", "Sha512", "public_key_from_pem", "key_id", "SignatureError"]

_M64 = 0xFFFFFFFFFFFFFFFF


class SignatureError(ValueError):
    """A key or signature file cannot be read (the message says why)."""


# ----------------------------------------------------------------------------- SHA-512 (FIPS 180-4)
def _iroot(n, k):
    """The integer k-th root of n (the largest r with r**k <= n), by bisection (MicroPython
    has no int.bit_length)."""
    lo, hi = 0, 1
    while hi ** k <= n:
        hi *= 2
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if mid ** k <= n:
            lo = mid
        else:
            hi = mid
    return lo


def _primes(count):
    out = []
    n = 2
    while len(out) < count:
        if all(n % p for p in out):
            out.append(n)
        n += 1
    return out


_K = []
_H0 = []


def _constants():
    """FIPS 180-4 4.2.3: K = the first 64 bits of the fractional parts of the cube roots of the
    first 80 primes; 5.3.5: H(0) = the same of the square roots of the first 8 primes."""
    if not _K:
        primes = _primes(80)
        _K.extend(_iroot(p << 192, 3) & _M64 for p in primes)
        _H0.extend(_iroot(p << 128, 2) & _M64 for p in primes[:8])


def _rotr(x, n):
    return ((x >> n) | (x << (64 - n))) & _M64


class Sha512:
    """SHA-512 (FIPS 180-4 section 6.4), for Pythons whose hashlib lacks it."""

    def __init__(self, data=b""):
        _constants()
        self._h = list(_H0)
        self._buf = b""
        self._n = 0
        self.update(data)

    def update(self, data):
        data = bytes(data)
        self._n += len(data)
        buf = self._buf + data
        end = len(buf) - len(buf) % 128
        for i in range(0, end, 128):
            self._block(buf[i:i + 128])
        self._buf = buf[end:]

    def _block(self, block):
        w = [int.from_bytes(block[i:i + 8], "big") for i in range(0, 128, 8)]
        for t in range(16, 80):
            x, y = w[t - 15], w[t - 2]
            s0 = _rotr(x, 1) ^ _rotr(x, 8) ^ (x >> 7)
            s1 = _rotr(y, 19) ^ _rotr(y, 61) ^ (y >> 6)
            w.append((w[t - 16] + s0 + w[t - 7] + s1) & _M64)
        a, b, c, d, e, f, g, h = self._h
        k = _K
        for t in range(80):
            t1 = (h + (_rotr(e, 14) ^ _rotr(e, 18) ^ _rotr(e, 41)) + ((e & f) ^ (~e & g)) + k[t] + w[t]) & _M64
            t2 = ((_rotr(a, 28) ^ _rotr(a, 34) ^ _rotr(a, 39)) + ((a & b) ^ (a & c) ^ (b & c))) & _M64
            h, g, f, e, d, c, b, a = g, f, e, (d + t1) & _M64, c, b, a, (t1 + t2) & _M64
        self._h = [(x + y) & _M64 for x, y in zip(self._h, (a, b, c, d, e, f, g, h))]

    def digest(self):
        # 5.1.2 padding: a 1 bit, zeros, and the message length in bits as 128 bits
        n = self._n
        tail = self._buf + b"\x80" + b"\x00" * ((111 - n) % 128) + (n * 8).to_bytes(16, "big")
        h = list(self._h)
        for i in range(0, len(tail), 128):
            self._block(tail[i:i + 128])
        out = b"".join(x.to_bytes(8, "big") for x in self._h)
        self._h = h
        return out


def sha512(data):
    """The SHA-512 digest (64 bytes) of ``data``: hashlib's where it has SHA-512, else :class:`Sha512`."""
    if hashlib is not None and hasattr(hashlib, "sha512"):
        return hashlib.sha512(data).digest()
    return Sha512(data).digest()


# ----------------------------------------------------------------------------- Ed25519 (RFC 8032 5.1)
_P = 2 ** 255 - 19
_L = 2 ** 252 + 27742317777372353535851937790883648493
_D = -121665 * pow(121666, _P - 2, _P) % _P
_SQRT_M1 = pow(2, (_P - 1) // 4, _P)


def _recover_x(y, sign):
    """RFC 8032 5.1.3 steps 2-4: x from y and x's sign bit, or None."""
    if y >= _P:
        return None
    u = (y * y - 1) % _P
    v = (_D * y * y + 1) % _P
    x = u * pow(v, 3, _P) * pow(u * pow(v, 7, _P), (_P - 5) // 8, _P) % _P
    vxx = v * x * x % _P
    if vxx == (-u) % _P:
        x = x * _SQRT_M1 % _P
    elif vxx != u:
        return None
    if x == 0 and sign:
        return None
    if x & 1 != sign:
        x = _P - x
    return x


def _decode(data):
    """A point (extended coordinates) from its 32-byte encoding, or None."""
    if len(data) != 32:
        return None
    y = int.from_bytes(data, "little")
    sign = y >> 255
    y &= (1 << 255) - 1
    x = _recover_x(y, sign)
    if x is None:
        return None
    return (x, y, 1, x * y % _P)


def _add(p, q):
    x1, y1, z1, t1 = p
    x2, y2, z2, t2 = q
    a = (y1 - x1) * (y2 - x2) % _P
    b = (y1 + x1) * (y2 + x2) % _P
    c = t1 * 2 * _D * t2 % _P
    d = z1 * 2 * z2 % _P
    e, f, g, h = b - a, d - c, d + c, b + a
    return (e * f % _P, g * h % _P, f * g % _P, e * h % _P)


def _double(p):
    x1, y1, z1, _ = p
    a = x1 * x1 % _P
    b = y1 * y1 % _P
    c = 2 * z1 * z1 % _P
    h = a + b
    e = h - (x1 + y1) * (x1 + y1)
    g = a - b
    f = c + g
    return (e * f % _P, g * h % _P, f * g % _P, e * h % _P)


def _mul(s, p):
    q = (0, 1, 1, 0)  # the neutral element
    while s > 0:
        if s & 1:
            q = _add(q, p)
        p = _double(p)
        s >>= 1
    return q


def _same(p, q):
    return (p[0] * q[2] - q[0] * p[2]) % _P == 0 and (p[1] * q[2] - q[1] * p[2]) % _P == 0


_BY = 4 * pow(5, _P - 2, _P) % _P
_B = (_recover_x(_BY, 0), _BY, 1, _recover_x(_BY, 0) * _BY % _P)


def verify(public_key, message, signature):
    """True when ``signature`` (64 bytes) is a valid Ed25519 signature of ``message`` (bytes)
    by ``public_key`` (32 bytes), as RFC 8032 section 5.1.7 decides; False otherwise
    (including wrong lengths and every non-canonical encoding)."""
    public_key, message, signature = bytes(public_key), bytes(message), bytes(signature)
    if len(public_key) != 32 or len(signature) != 64:
        return False
    a = _decode(public_key)
    r = _decode(signature[:32])
    if a is None or r is None:
        return False
    s = int.from_bytes(signature[32:], "little")
    if s >= _L:
        return False
    k = int.from_bytes(sha512(signature[:32] + public_key + message), "little") % _L
    left = _mul(8, _mul(s, _B))
    right = _mul(8, _add(r, _mul(k, a)))
    return _same(left, right)


# ----------------------------------------------------------------------------- key files
# DER of SubjectPublicKeyInfo for Ed25519 (RFC 8410 section 4): SEQUENCE { SEQUENCE { OID
# 1.3.101.112 }, BIT STRING (0 unused bits) } followed by the 32 key bytes.
SPKI_PREFIX = b"\x30\x2a\x30\x05\x06\x03\x2b\x65\x70\x03\x21\x00"
PEM_BEGIN = "-----BEGIN PUBLIC KEY-----"
PEM_END = "-----END PUBLIC KEY-----"


def public_key_from_pem(text):
    """The 32-byte Ed25519 public keys in PEM text (one or more ``PUBLIC KEY`` blocks), as a
    list; SignatureError naming the problem when there is none or one is not Ed25519."""
    if isinstance(text, bytes):
        try:
            text = text.decode("ascii")
        except UnicodeError:
            raise SignatureError("not a PEM text file (it holds bytes that are not ASCII)")
    keys = []
    inside = None
    for line in text.split("\n"):
        line = line.strip()
        if line == PEM_BEGIN:
            inside = []
        elif line == PEM_END and inside is not None:
            try:
                der = binascii.a2b_base64("".join(inside).encode("ascii"))  # MicroPython: bytes only
            except Exception:  # binascii.Error (CPython) / ValueError (MicroPython)
                raise SignatureError("a PUBLIC KEY block is not valid base64")
            if len(der) != 44 or der[:12] != SPKI_PREFIX:
                raise SignatureError("a PUBLIC KEY block is not an Ed25519 key (RFC 8410)")
            keys.append(der[12:])
            inside = None
        elif inside is not None:
            inside.append(line)
    if not keys:
        raise SignatureError("no '%s' block found" % PEM_BEGIN)
    return keys


def key_id(public_key):
    """A short name for a key: the first 16 hex digits of the SHA-256 of its 32 bytes."""
    return "%02x" * 8 % tuple(hashlib.sha256(bytes(public_key)).digest()[:8])
