"""The box's standard-library Ed25519 verifier and SHA-512 (runtime/boxwood_runtime/signature.py).

Outside references:
* RFC 8032 section 7.1 test vectors (TEST 1, 2, 3, SHA(abc)). The RFC text is not on this
  machine: the hex values below were typed FROM MEMORY, and every one is confirmed here
  against the ``cryptography`` package (OpenSSL's Ed25519): its public key derived from the
  RFC's secret key, and its signature of the RFC's message, byte for byte. TEST 1024's
  1023-byte message is not typed (not certain from memory): only its key pair is checked.
* FIPS 180-2 appendix C / NIST example values for SHA-512 ("abc", the 896-bit two-block
  message, one million 'a'), typed FROM MEMORY and confirmed against Python's hashlib.
* Random keys and messages signed by ``cryptography``: ours must accept them; tampered
  messages, signatures and keys must fail (planted faults).
* Non-canonical encodings (RFC 8032 5.1.3 / 5.1.7): S >= L, y >= p, x = 0 with the sign bit.
* The same verifier and SHA-512 under MicroPython (WebAssembly port, tests/test_micropython.py),
  whose hashlib has no sha512, compared with CPython's results.
"""
from __future__ import annotations

import hashlib
import os
import random

import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from boxwood import micropython as mp
from boxwood_runtime import signature
from boxwood_runtime.signature import Sha512, public_key_from_pem, sha512, verify

P = 2 ** 255 - 19
L = 2 ** 252 + 27742317777372353535851937790883648493  # RFC 8032 5.1 (common practice: the Ed25519 group order)

# RFC 8032 section 7.1, typed from memory; confirmed against cryptography in test_rfc8032_vectors.
RFC_VECTORS = {
    "TEST 1": ("9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60",
               "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a",
               "",
               "e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590a33bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b"),
    "TEST 2": ("4ccd089b28ff96da9db6c346ec114e0f5b8a319f35aba624da8cf6ed4fb8a6fb",
               "3d4017c3e843895a92b70aa74d1b7ebc9c982ccf2ec4968cc0cd55f12af4660c",
               "72",
               "92a009a9f0d4cab8720e820b5f642540a2b27b5416503f8fb3762223ebdb69da085ac1e43e15996e458f3613d0f11d8c387b2eaeb4302aeeb00d291612bb0c00"),
    "TEST 3": ("c5aa8df43f9f837bedb7442f31dcb7b166d38535076f094b85ce3a2e0b4458f7",
               "fc51cd8e6218a1a38da47ed00230f0580816ed13ba3303ac5deb911548908025",
               "af82",
               "6291d657deec24024827e69c3abe01a30ce548a284743a445e3680d7db5ac3ac18ff9b538d16f290ae67f760984dc6594a7c15e9716ed28dc027beceea1ec40a"),
    "TEST SHA(abc)": ("833fe62409237b9d62ec77587520911e9a759cec1d19755b7da901b96dca3d42",
                      "ec172b93ad5e563bf4932c70e1245034c35467ef2efd4d64ebf819683467e2bf",
                      "ddaf35a193617abacc417349ae20413112e6fa4e89a97ea20a9eeee64b55d39a"
                      "2192992a274fc1a836ba3c23a3feebbd454d4423643ce80e2a9ac94fa54ca49f",
                      "dc2a4459e7369633a52b1bf277839a00201009a3efbf3ecb69bea2186c26b58909351fc9ac90b3ecfdfbc7c66431e0303dca179c138ac17ad9bef1177331a704"),
}
# TEST 1024's key pair (from memory; confirmed against cryptography below). Its message is not typed.
RFC_TEST_1024_KEYS = ("f5e5767cf153319517630f226876b86c8160cc583bc013744c6bf255f5cc0ee5",
                      "278117fc144c72340f67d0f2316e8386ceffbf2b2428c9c51fef7c597f1d426e")

# FIPS 180-2 appendix C (SHA-512 examples), typed from memory; confirmed against hashlib below.
SHA512_EXAMPLES = [
    (b"abc", "ddaf35a193617abacc417349ae20413112e6fa4e89a97ea20a9eeee64b55d39a"
             "2192992a274fc1a836ba3c23a3feebbd454d4423643ce80e2a9ac94fa54ca49f"),
    (b"abcdefghbcdefghicdefghijdefghijkefghijklfghijklmghijklmnhijklmnoijklmnopjklmnopqklmnopqrlmnopqrsmnopqrst"
     b"nopqrstu",
     "8e959b75dae313da8cf4f72814fc143f8f7779c6eb9f7fa17299aeadb6889018501d289e4900f7e4331b99dec4b5433ac7d329eeb6dd26545e96e55b874be909"),
    (b"a" * 1000000, "e718483d0ce769644e2e42c7bc15b4638e1f98b13b2044285632a803afa973eb"
                     "de0ff244877ea60a4cb0432ce577c31beb009c5c2c49aa2e4eadb217ad8cc09b"),
]


def raw_public(private):
    return private.public_key().public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)


# ----------------------------------------------------------------------------- SHA-512
@pytest.mark.parametrize("message,want", SHA512_EXAMPLES, ids=["abc", "896-bit", "million-a"])
def test_sha512_nist_examples(message, want):
    assert hashlib.sha512(message).hexdigest() == want  # the remembered value, confirmed by hashlib
    assert Sha512(message).digest().hex() == want
    assert sha512(message).hex() == want  # what the verifier calls (hashlib's here)


def test_sha512_against_hashlib_at_every_padding_boundary():
    rng = random.Random(8032)
    for n in list(range(0, 260)) + [1000, 4095, 4096, 4097]:
        data = bytes(rng.getrandbits(8) for _ in range(n))
        assert Sha512(data).digest() == hashlib.sha512(data).digest(), n
    h = Sha512()
    for part in (b"ab", b"c" * 200, b"", b"d" * 55):  # incremental updates equal one call
        h.update(part)
    assert h.digest() == hashlib.sha512(b"ab" + b"c" * 200 + b"d" * 55).digest()


def test_sha512_planted_fault_is_caught(monkeypatch):
    signature._constants()
    k = list(signature._K)
    monkeypatch.setattr(signature, "_K", k[:79] + [k[79] ^ 1])  # one bit of one round constant
    assert Sha512(b"abc").digest().hex() != SHA512_EXAMPLES[0][1]


# ----------------------------------------------------------------------------- Ed25519
@pytest.mark.parametrize("name", sorted(RFC_VECTORS))
def test_rfc8032_vectors(name):
    secret, public, message, sig = (bytes.fromhex(v) for v in RFC_VECTORS[name])
    ref = Ed25519PrivateKey.from_private_bytes(secret)
    assert raw_public(ref) == public  # the remembered public key, confirmed by cryptography
    assert ref.sign(message) == sig  # the remembered signature, confirmed byte for byte
    assert verify(public, message, sig)
    assert not verify(public, message + b"\x00", sig)


def test_rfc8032_test_1024_key_pair():
    secret, public = (bytes.fromhex(v) for v in RFC_TEST_1024_KEYS)
    ref = Ed25519PrivateKey.from_private_bytes(secret)
    assert raw_public(ref) == public
    message = os.urandom(1023)  # the RFC's message length, random content
    assert verify(public, message, ref.sign(message))


def test_random_keys_and_messages_against_cryptography():
    rng = random.Random(25519)
    for i in range(40):
        key = Ed25519PrivateKey.generate()
        public = raw_public(key)
        message = bytes(rng.getrandbits(8) for _ in range(rng.choice([0, 1, 31, 64, 200, 1500])))
        sig = key.sign(message)
        assert verify(public, message, sig)
        # planted faults: each must fail, and cryptography agrees that it fails
        bad_sig = bytearray(sig)
        bad_sig[rng.randrange(64)] ^= 1 << rng.randrange(8)
        bad_msg = bytearray(message + b"x")
        bad_msg[rng.randrange(len(bad_msg))] ^= 1 << rng.randrange(8)
        other = raw_public(Ed25519PrivateKey.generate())
        for pk, msg, sg in ((public, message, bytes(bad_sig)), (public, bytes(bad_msg), sig), (other, message, sig)):
            assert not verify(pk, msg, sg)
            with pytest.raises(Exception):
                Ed25519PublicKey.from_public_bytes(pk).verify(sg, msg)


def test_non_canonical_s_is_rejected():
    """RFC 8032 5.1.7: S must be in range 0 <= S < L. S + L passes the group equation, so only the
    range check refuses it (the planted fault: cryptography refuses it too)."""
    key = Ed25519PrivateKey.generate()
    public, message = raw_public(key), b"bundle manifest"
    sig = key.sign(message)
    s = int.from_bytes(sig[32:], "little")
    high = sig[:32] + (s + L).to_bytes(32, "little")
    assert s + L < 2 ** 256
    assert not verify(public, message, high)
    with pytest.raises(Exception):
        Ed25519PublicKey.from_public_bytes(public).verify(high, message)
    # and the group equation alone would accept it: the range check is what refuses it
    assert s < L and signature._same(signature._mul(s + L, signature._B), signature._mul(s, signature._B))


def test_non_canonical_point_encodings_are_rejected():
    """RFC 8032 5.1.3: y >= p fails; x = 0 with the sign bit set fails."""
    assert signature._decode((1).to_bytes(32, "little")) is not None  # y = 1, x = 0: the neutral point
    assert signature._decode((1 | 1 << 255).to_bytes(32, "little")) is None  # x = 0 with sign 1
    assert signature._decode((P + 1).to_bytes(32, "little")) is None  # y = p + 1 (same y as 1, >= p)
    assert signature._decode((P - 1).to_bytes(32, "little")) is not None  # y = p - 1: in range, on the curve
    for y in range(P, P + 19):  # every y >= p that fits 255 bits
        assert signature._decode(y.to_bytes(32, "little")) is None
    key = Ed25519PrivateKey.generate()
    public, message = raw_public(key), b"m"
    sig = key.sign(message)
    # a public key with y >= p: an encoding that names the same y as a small valid one is refused
    assert not verify((P + 1).to_bytes(32, "little"), message, sig)
    assert not verify((1 | 1 << 255).to_bytes(32, "little"), message, sig)
    # R with y >= p
    assert not verify(public, message, (P + 1).to_bytes(32, "little") + sig[32:])


def test_wrong_lengths_are_false_not_errors():
    key = Ed25519PrivateKey.generate()
    public, sig = raw_public(key), key.sign(b"")
    assert verify(public, b"", sig)
    for pk, sg in ((public[:31], sig), (public + b"\x00", sig), (public, sig[:63]), (public, sig + b"\x00"), (b"", b"")):
        assert verify(pk, b"", sg) is False


def test_public_key_pem_matches_cryptography():
    keys = [Ed25519PrivateKey.generate() for _ in range(2)]
    pems = [k.public_key().public_bytes(serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo)
            for k in keys]
    assert public_key_from_pem(pems[0]) == [raw_public(keys[0])]
    assert public_key_from_pem(b"# trusted\n" + pems[0] + pems[1]) == [raw_public(k) for k in keys]
    for bad, why in ((b"", "no '-----BEGIN"), (pems[0].replace(b"MCowBQYDK2VwAyEA", b"MCowBQYDK2VxAyEA"), "not an Ed25519"),
                     (b"\xff\xfe", "not a PEM"), (b"-----BEGIN PUBLIC KEY-----\n!!!!\n-----END PUBLIC KEY-----\n",
                                                  "base64|not an Ed25519")):
        with pytest.raises(signature.SignatureError, match=why):
            public_key_from_pem(bad)


# ----------------------------------------------------------------------------- MicroPython
MPY_PROGRAM = """
import sys, hashlib
sys.path.insert(0, '/box')
import signature
print('sha512-in-hashlib', hasattr(hashlib, 'sha512'))
print('abc', signature.sha512(b'abc').hex() if hasattr(b'', 'hex') else '')
print('two-block', ''.join('%02x' % b for b in signature.Sha512(TWO).digest()))
for pk, msg, sig in CASES:
    print('verify', signature.verify(bytes.fromhex(pk), bytes.fromhex(msg), bytes.fromhex(sig)))
"""


def test_verifier_and_sha512_under_micropython():
    reason = mp.unavailable_reason()
    if reason:
        if os.environ.get("CI"):
            pytest.fail("MicroPython is required in CI: " + reason)
        pytest.skip(reason)
    cases = []
    for name in sorted(RFC_VECTORS):
        _, public, message, sig = RFC_VECTORS[name]
        cases.append((public, message, sig))
        bad = bytearray(bytes.fromhex(sig))
        bad[5] ^= 4
        cases.append((public, message, bad.hex()))  # planted fault: must be False there too
    s = int.from_bytes(bytes.fromhex(cases[0][2])[32:], "little")
    cases.append((cases[0][0], cases[0][1], cases[0][2][:64] + (s + L).to_bytes(32, "little").hex()))
    want = [True, False] * len(RFC_VECTORS) + [False]
    two = SHA512_EXAMPLES[1][0]
    code = "TWO = %r\nCASES = %r\n" % (two, cases) + MPY_PROGRAM
    runtime = os.path.dirname(signature.__file__)
    with open(os.path.join(runtime, "signature.py"), "rb") as fh:
        done = mp.run(code, {"/box/signature.py": fh.read()})
    assert done.returncode == 0, done.stderr
    lines = done.stdout.split("\n")
    assert lines[0] == "sha512-in-hashlib False"  # so the FIPS 180-4 code is what ran
    if lines[1] != "abc ":
        assert lines[1] == "abc " + SHA512_EXAMPLES[0][1]
    assert lines[2] == "two-block " + SHA512_EXAMPLES[1][1]
    assert [line for line in lines if line.startswith("verify ")] == ["verify %s" % w for w in want]
