"""Primitives against published vectors: SHA-256, Ed25519, canonical JSON, HKDF/HMAC."""

from __future__ import annotations

import hashlib
import hmac
import json
import struct

import pytest

from claimkit.evidence import signing
from claimkit.evidence.canonical import canonical_json, format_number, is_canonical
from claimkit.evidence.keys import derive_detection_seed, derive_payload_tag
from claimkit.evidence.storage import sha256_file, sha256_hex

# FIPS 180-4 examples (NIST "SHA256.pdf" example values, and the one-million-"a" test
# from FIPS 180-2 Appendix B.3).
FIPS_SHA256 = [
    (b"abc", "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"),
    (b"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq",
     "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1"),
    (b"a" * 1_000_000, "cdc76e5c9914fb9281a1c7e284d73e67f1809a48a497200e046d39ccc7112cd0"),
]


@pytest.mark.parametrize("message,digest", FIPS_SHA256)
def test_sha256_fips_180_4(tmp_path, message, digest):
    # FIPS 180-4 example vectors, for bytes and for a streamed file.
    assert sha256_hex(message) == digest
    f = tmp_path / "m.bin"
    f.write_bytes(message)
    assert sha256_file(f) == digest


# RFC 8032 section 7.1, TEST 1-3: (secret key, public key, message, signature).
RFC8032 = [
    ("9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60",
     "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a", "",
     ("e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e06522490155"
      "5fb8821590a33bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b")),
    ("4ccd089b28ff96da9db6c346ec114e0f5b8a319f35aba624da8cf6ed4fb8a6fb",
     "3d4017c3e843895a92b70aa74d1b7ebc9c982ccf2ec4968cc0cd55f12af4660c", "72",
     ("92a009a9f0d4cab8720e820b5f642540a2b27b5416503f8fb3762223ebdb69da"
      "085ac1e43e15996e458f3613d0f11d8c387b2eaeb4302aeeb00d291612bb0c00")),
    ("c5aa8df43f9f837bedb7442f31dcb7b166d38535076f094b85ce3a2e0b4458f7",
     "fc51cd8e6218a1a38da47ed00230f0580816ed13ba3303ac5deb911548908025", "af82",
     ("6291d657deec24024827e69c3abe01a30ce548a284743a445e3680d7db5ac3ac"
      "18ff9b538d16f290ae67f760984dc6594a7c15e9716ed28dc027beceea1ec40a")),
]


@pytest.mark.parametrize("sk,pk,msg,sig", RFC8032)
def test_ed25519_rfc8032(sk, pk, msg, sig):
    # RFC 8032 section 7.1 test vectors: key derivation, signature, verification.
    key = signing.private_from_seed(bytes.fromhex(sk))
    assert signing.raw_public(key.public_key()).hex() == pk
    assert signing.sign(key, bytes.fromhex(msg)).hex() == sig
    pub = signing.public_from_raw(bytes.fromhex(pk))
    assert signing.verify(pub, bytes.fromhex(msg), bytes.fromhex(sig))
    bad = bytearray(bytes.fromhex(sig))
    bad[5] ^= 1
    assert not signing.verify(pub, bytes.fromhex(msg), bytes(bad))
    assert not signing.verify(pub, bytes.fromhex(msg) + b"x", bytes.fromhex(sig))


# RFC 8785 Appendix B: IEEE 754 bit patterns and their canonical text.
RFC8785_NUMBERS = {
    "0000000000000000": "0", "8000000000000000": "0", "0000000000000001": "5e-324",
    "8000000000000001": "-5e-324", "7fefffffffffffff": "1.7976931348623157e+308",
    "ffefffffffffffff": "-1.7976931348623157e+308", "4340000000000000": "9007199254740992",
    "c340000000000000": "-9007199254740992", "4430000000000000": "295147905179352830000",
    "44b52d02c7e14af5": "9.999999999999997e+22", "44b52d02c7e14af6": "1e+23",
    "44b52d02c7e14af7": "1.0000000000000001e+23", "444b1ae4d6e2ef4e": "999999999999999700000",
    "444b1ae4d6e2ef4f": "999999999999999900000", "444b1ae4d6e2ef50": "1e+21",
    "3eb0c6f7a0b5ed8c": "9.999999999999997e-7", "3eb0c6f7a0b5ed8d": "0.000001",
    "41b3de4355555553": "333333333.3333332", "41b3de4355555554": "333333333.33333325",
    "41b3de4355555555": "333333333.3333333", "41b3de4355555556": "333333333.3333334",
    "41b3de4355555557": "333333333.33333343", "becbf647612f3696": "-0.0000033333333333333333",
    "43143ff3c1cb0959": "1424953923781206.2",
}


@pytest.mark.parametrize("bits,text", sorted(RFC8785_NUMBERS.items()))
def test_canonical_numbers_rfc8785(bits, text):
    # RFC 8785 Appendix B number serialisation samples.
    assert format_number(struct.unpack(">d", bytes.fromhex(bits))[0]) == text


@pytest.mark.parametrize("bits", ["7fffffffffffffff", "7ff0000000000000", "fff0000000000000"])
def test_canonical_refuses_nan_and_infinity(bits):
    # RFC 8785 section 3.2.2.2: NaN and Infinity are errors.
    with pytest.raises(ValueError):
        canonical_json({"x": struct.unpack(">d", bytes.fromhex(bits))[0]})


def test_canonical_rfc8785_examples():
    # RFC 8785 section 3.2.2 (input) and 3.2.3 (output) example.
    src = ('{"numbers": [333333333.33333329, 1E30, 4.50, 2e-3, 0.000000000000000000000000001],'
           ' "string": "\\u20ac$\\u000F\\u000aA\'\\u0042\\u0022\\u005c\\\\\\"\\/",'
           ' "literals": [null, true, false]}')
    want = ('{"literals":[null,true,false],"numbers":[333333333.3333333,1e+30,4.5,0.002,1e-27],'
            '"string":"\u20ac$\\u000f\\nA\'B\\"\\\\\\\\\\"/"}').encode()
    assert canonical_json(json.loads(src)) == want
    assert is_canonical(want) and not is_canonical(b'{"a": 1}')
    # RFC 8785 section 3.2.3: member names sorted by UTF-16 code units.
    src = ('{"\\u20ac": "Euro Sign", "\\r": "Carriage Return", "\\ufb33": "Hebrew Letter Dalet '
           'With Dagesh", "1": "One", "\\ud83d\\ude00": "Emoji: Grinning Face", "\\u0080": '
           '"Control", "\\u00f6": "Latin Small Letter O With Diaeresis"}')
    order = list(json.loads(canonical_json(json.loads(src))).values())
    assert order == ["Carriage Return", "One", "Control", "Latin Small Letter O With Diaeresis",
                     "Euro Sign", "Emoji: Grinning Face", "Hebrew Letter Dalet With Dagesh"]


def test_canonical_refuses_what_json_cannot_hold():
    for bad in ({"a": {1, 2}}, {"a": b"x"}, {1: "a"}, {"a": 2**60}, {"a": "\ud800"}):
        with pytest.raises((TypeError, ValueError)):
            canonical_json(bad)


def _hkdf_sha256(ikm: bytes, info: bytes, length: int = 32) -> bytes:
    # RFC 5869 written out with hmac/hashlib (salt absent = HashLen zero bytes).
    prk = hmac.new(b"\x00" * 32, ikm, hashlib.sha256).digest()
    okm, block, i = b"", b"", 1
    while len(okm) < length:
        block = hmac.new(prk, block + info + bytes([i]), hashlib.sha256).digest()
        okm += block
        i += 1
    return okm[:length]


def test_hkdf_rfc5869_case3_and_derivations():
    # RFC 5869 Appendix A.3 (SHA-256, zero-length salt and info): checks the hand-written HKDF.
    ikm = bytes([0x0B]) * 22
    okm = ("8da4e775a563c18f715f802a063c5a31b8a11f5c5ee1879ec3454e5f3c738d2d"
           "9d201395faa4b61a96c8")
    assert _hkdf_sha256(ikm, b"", 42).hex() == okm
    # ... and with it, the documented derivations of the detection seed and payload tag.
    secret = bytes(range(32))
    assert derive_detection_seed(secret) == _hkdf_sha256(secret, b"claimkit/detection/v1")
    tag_key = _hkdf_sha256(secret, b"claimkit/payload-tag/v1")
    mac = hmac.new(tag_key, (0xBEEF).to_bytes(2, "big") + (4242).to_bytes(3, "big"),
                   hashlib.sha256).digest()
    assert derive_payload_tag(tag_key, 0xBEEF, 4242) == int.from_bytes(mac[:3], "big")
