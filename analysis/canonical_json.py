"""Canonical JSON: the one byte form every LatentDesk hash is computed over.

New hashes use RFC 8785, the JSON Canonicalization Scheme (JCS) (A. Rundgren,
B. Jordan, S. Erdtman, 2020): UTF-8, no whitespace, object members sorted by
the UTF-16 code units of their names (section 3.2.3), numbers written as
ECMAScript writes an IEEE 754 double (section 3.2.2.3), strings with the
minimal escapes of section 3.2.2.2.  The ``rfc8785`` package (Trail of Bits)
does the serialising; this module only names the scheme, so anyone can
recompute a hash with any RFC 8785 implementation in any language.

Hashes written before RFC 8785 was adopted used a home-made form, Python's
``json.dumps(value, sort_keys=True, separators=(",", ":"))``, which differs
from RFC 8785 on some numbers (``1e-07``, ``1e+16``) and on the order of
names outside the Basic Multilingual Plane.  It came in two variants, each
named by the scheme recorded beside the hash:

- ``ld-json-1``: non-ASCII text kept as UTF-8 (the review log);
- ``ld-json-ascii-1``: non-ASCII text as ``\\uXXXX`` escapes (model files).

``legacy_canonical_json`` keeps them, for verifying those old hashes only.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

import rfc8785

RFC8785 = "rfc8785"
LEGACY_UTF8 = "ld-json-1"
LEGACY_ASCII = "ld-json-ascii-1"
SCHEMES = (RFC8785, LEGACY_UTF8, LEGACY_ASCII)


class CanonicalJSONError(ValueError):
    """A value with no canonical JSON form (NaN, infinity, an integer beyond 2**53, a non-text key, ...)."""


def canonical_json(value: Any) -> bytes:
    """The RFC 8785 canonical form of ``value`` (UTF-8 bytes).

    Values are JSON types: dict (text keys), list or tuple, str, int within
    +-(2**53 - 1), finite float, bool, None.  Anything else is a
    ``CanonicalJSONError`` naming the problem.
    """
    try:
        return rfc8785.dumps(value)
    except rfc8785.CanonicalizationError as exc:
        raise CanonicalJSONError(f"no canonical JSON (RFC 8785) for this value: {exc}") from exc


def legacy_canonical_json(value: Any, scheme: str) -> bytes:
    """The pre-RFC 8785 form named ``scheme`` (``ld-json-1`` or ``ld-json-ascii-1``); old hashes only."""
    if scheme not in (LEGACY_UTF8, LEGACY_ASCII):
        raise CanonicalJSONError(f"{scheme!r} is not a legacy canonical JSON scheme")
    ascii_only = scheme == LEGACY_ASCII
    try:
        text = json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=ascii_only, allow_nan=False)
    except (TypeError, ValueError) as exc:
        raise CanonicalJSONError(f"no canonical JSON ({scheme}) for this value: {exc}") from exc
    return text.encode("ascii" if ascii_only else "utf-8")


def canonical_sha256(value: Any, scheme: str = RFC8785) -> str:
    """SHA-256 (hex) of ``value``'s canonical JSON under ``scheme`` (RFC 8785 unless told otherwise)."""
    if scheme == RFC8785:
        data = canonical_json(value)
    elif scheme in SCHEMES:
        data = legacy_canonical_json(value, scheme)
    else:
        raise CanonicalJSONError(f"unknown canonical JSON scheme {scheme!r} (known: {', '.join(SCHEMES)})")
    return hashlib.sha256(data).hexdigest()
