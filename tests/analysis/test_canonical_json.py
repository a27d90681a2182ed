"""analysis.canonical_json against RFC 8785's own examples, and the legacy forms it keeps.

Source: RFC 8785, JSON Canonicalization Scheme (JCS), A. Rundgren, B. Jordan, S. Erdtman, 2020:
section 3.2.1 (no whitespace), 3.2.2 (a sample), 3.2.2.2 (strings), 3.2.2.3 (numbers, by
ECMA-262 10th edition, 2019, section 7.1.12.1 Number::toString), 3.2.3 (member names sorted by
UTF-16 code units; the sample sorted), 3.2.4 (its UTF-8 bytes), Appendix B (number
serialisation samples, IEEE 754 bits -> JSON text).
The legacy forms are Python's ``json.dumps(value, sort_keys=True, separators=(",", ":"))``
(Python standard library documentation, ``json``), the form hashes were computed over before.
"""

from __future__ import annotations

import hashlib
import json
import struct

import pytest

from analysis.canonical_json import (
    LEGACY_ASCII,
    LEGACY_UTF8,
    RFC8785,
    CanonicalJSONError,
    canonical_json,
    canonical_sha256,
    legacy_canonical_json,
)


def _double(bits: str) -> float:
    return struct.unpack(">d", bytes.fromhex(bits))[0]


# RFC 8785 Appendix B, every finite sample: IEEE 754 bits -> the JSON text.
APPENDIX_B = [
    ("0000000000000000", "0"),  # zero
    ("8000000000000000", "0"),  # minus zero
    ("0000000000000001", "5e-324"),  # min pos number
    ("8000000000000001", "-5e-324"),  # min neg number
    ("7fefffffffffffff", "1.7976931348623157e+308"),  # max pos number
    ("ffefffffffffffff", "-1.7976931348623157e+308"),  # max neg number
    ("4340000000000000", "9007199254740992"),  # max pos int
    ("c340000000000000", "-9007199254740992"),  # max neg int
    ("4430000000000000", "295147905179352830000"),  # ~2**68
    ("44b52d02c7e14af5", "9.999999999999997e+22"),
    ("44b52d02c7e14af6", "1e+23"),
    ("44b52d02c7e14af7", "1.0000000000000001e+23"),
    ("444b1ae4d6e2ef4e", "999999999999999700000"),
    ("444b1ae4d6e2ef4f", "999999999999999900000"),
    ("444b1ae4d6e2ef50", "1e+21"),
    ("3eb0c6f7a0b5ed8c", "9.999999999999997e-7"),
    ("3eb0c6f7a0b5ed8d", "0.000001"),
    ("41b3de4355555553", "333333333.3333332"),
    ("41b3de4355555554", "333333333.33333325"),
    ("41b3de4355555555", "333333333.3333333"),
    ("41b3de4355555556", "333333333.3333334"),
    ("41b3de4355555557", "333333333.33333343"),
    ("becbf647612f3696", "-0.0000033333333333333333"),
    ("43143ff3c1cb0959", "1424953923781206.2"),  # round to even
]


@pytest.mark.parametrize("bits,text", APPENDIX_B)
def test_numbers_as_in_rfc8785_appendix_b(bits, text):
    assert canonical_json(_double(bits)) == text.encode("ascii")


@pytest.mark.parametrize("bits", ["7fffffffffffffff", "7ff0000000000000", "fff0000000000000"])
def test_nan_and_infinity_are_refused(bits):
    # RFC 8785 Appendix B (NaN, Infinity) and the note in section 3.2.2.3: no JSON form, an error.
    with pytest.raises(CanonicalJSONError):
        canonical_json({"x": _double(bits)})


@pytest.mark.parametrize(
    "value,text",
    [
        # ECMA-262 (2019) 7.1.12.1, the rule RFC 8785 section 3.2.2.3 adopts: exponent form below 1e-6 ...
        (1e-7, "1e-7"),
        (1.5e-7, "1.5e-7"),
        (0.000001, "0.000001"),
        # ... whole numbers below 1e21 written out in full, exponent form from 1e21 on.
        (1e16, "10000000000000000"),
        (1e20, "100000000000000000000"),
        (1e21, "1e+21"),
        (-0.0, "0"),
        (4.50, "4.5"),
        (2e-3, "0.002"),
    ],
)
def test_numbers_follow_ecmascript_where_python_differs(value, text):
    assert canonical_json(value) == text.encode("ascii")


def test_integers_beyond_two_to_the_53_are_refused():
    # RFC 8785 section 3.2.2.3: numbers are IEEE 754 doubles (I-JSON, RFC 7493 section 2.2);
    # 2**53 + 1 has no exact double.
    assert canonical_json(2**53 - 1) == b"9007199254740991"
    with pytest.raises(CanonicalJSONError):
        canonical_json(2**53 + 1)


def test_member_names_sort_by_utf16_code_units():
    # RFC 8785 section 3.2.3, its example: U+1F600 is the surrogate pair D83D DE00 and so sorts
    # before U+FB33, although its code point is larger.
    value = {
        "\u20ac": "Euro Sign",
        "\r": "Carriage Return",
        "\ufb33": "Hebrew Letter Dalet With Dagesh",
        "1": "One",
        "\U0001f600": "Emoji: Grinning Face",
        "\u0080": "Control",
        "\u00f6": "Latin Small Letter O With Diaeresis",
    }
    expected = (
        '{"\\r":"Carriage Return","1":"One","\u0080":"Control","\u00f6":"Latin Small Letter O With Diaeresis",'
        '"\u20ac":"Euro Sign","\U0001f600":"Emoji: Grinning Face","\ufb33":"Hebrew Letter Dalet With Dagesh"}'
    )
    assert canonical_json(value) == expected.encode("utf-8")


def test_the_sample_of_sections_3_2_2_to_3_2_4():
    # RFC 8785: the input of section 3.2.2 as parsed, its canonical form in section 3.2.3 and
    # the UTF-8 bytes of that form in section 3.2.4.
    source = (
        '{"numbers": [333333333.33333329, 1E30, 4.50, 2e-3, 0.000000000000000000000000001],'
        ' "string": "\\u20ac$\\u000F\\u000aA\'\\u0042\\u0022\\u005c\\\\\\"\\/",'
        ' "literals": [null, true, false]}'
    )
    section_3_2_4 = bytes.fromhex(
        "7b 22 6c 69 74 65 72 61 6c 73 22 3a 5b 6e 75 6c 6c 2c 74 72"
        "75 65 2c 66 61 6c 73 65 5d 2c 22 6e 75 6d 62 65 72 73 22 3a"
        "5b 33 33 33 33 33 33 33 33 33 2e 33 33 33 33 33 33 33 2c 31"
        "65 2b 33 30 2c 34 2e 35 2c 30 2e 30 30 32 2c 31 65 2d 32 37"
        "5d 2c 22 73 74 72 69 6e 67 22 3a 22 e2 82 ac 24 5c 75 30 30"
        "30 66 5c 6e 41 27 42 5c 22 5c 5c 5c 5c 5c 22 2f 22 7d"
    )
    section_3_2_3 = (
        '{"literals":[null,true,false],"numbers":[333333333.3333333,1e+30,4.5,0.002,1e-27],'
        '"string":"\u20ac$\\u000f\\nA\'B\\"\\\\\\\\\\"/"}'
    )
    assert canonical_json(json.loads(source)) == section_3_2_4 == section_3_2_3.encode("utf-8")


def test_no_whitespace_and_non_ascii_text_as_utf8():
    # RFC 8785 section 3.2.1 (no whitespace between tokens), 3.2.2.2 (only control characters,
    # quote and backslash are escaped; other text is UTF-8 as it is).
    assert canonical_json({"b": 1, "a": [2, {"d": "x", "c": None}]}) == b'{"a":[2,{"c":null,"d":"x"}],"b":1}'
    assert canonical_json({"name": "J\u00f6rg \u00d8deg\u00e5rd"}) == '{"name":"Jörg Ødegård"}'.encode("utf-8")


def test_legacy_forms_are_pythons_json_and_differ_from_rfc8785():
    # The pre-RFC 8785 forms (Python json documentation: repr of floats, sort_keys by code point).
    value = {"\ufb33": 1e-7, "\U0001f600": 1e16, "name": "Gr\u00fcn"}
    assert legacy_canonical_json(value, LEGACY_UTF8) == (
        '{"name":"Grün","\ufb33":1e-07,"\U0001f600":1e+16}'.encode("utf-8")
    )
    assert legacy_canonical_json(value, LEGACY_ASCII) == (
        b'{"name":"Gr\\u00fcn","\\ufb33":1e-07,"\\ud83d\\ude00":1e+16}'
    )
    assert canonical_json(value) == '{"name":"Grün","\U0001f600":10000000000000000,"\ufb33":1e-7}'.encode("utf-8")


def test_canonical_sha256_hashes_the_bytes_of_the_scheme_named():
    # FIPS 180-4 SHA-256 over the canonical bytes, computed here with hashlib.
    value = {"x": 1e-7, "t": "Grün"}
    assert canonical_sha256(value) == hashlib.sha256('{"t":"Grün","x":1e-7}'.encode("utf-8")).hexdigest()
    assert canonical_sha256(value, RFC8785) == canonical_sha256(value)
    assert canonical_sha256(value, LEGACY_UTF8) == hashlib.sha256('{"t":"Grün","x":1e-07}'.encode()).hexdigest()
    assert canonical_sha256(value, LEGACY_ASCII) == hashlib.sha256(b'{"t":"Gr\\u00fcn","x":1e-07}').hexdigest()
    with pytest.raises(CanonicalJSONError, match="unknown canonical JSON scheme 'sorted-keys'"):
        canonical_sha256(value, "sorted-keys")
    with pytest.raises(CanonicalJSONError, match="not a legacy"):
        legacy_canonical_json(value, RFC8785)


def test_values_that_are_not_json_are_refused_by_every_scheme():
    for scheme in (RFC8785, LEGACY_UTF8, LEGACY_ASCII):
        with pytest.raises(CanonicalJSONError):
            canonical_sha256({"when": object()}, scheme)
        with pytest.raises(CanonicalJSONError):
            canonical_sha256({"x": float("nan")}, scheme)
