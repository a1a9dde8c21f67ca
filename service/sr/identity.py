"""Deterministic DICOM UIDs and configuration digests.

Re-sending the same sources under the same rules and configuration must give the same result
SOP Instance UID, so a PACS never holds two copies of one result.  UIDs are therefore derived
from their inputs instead of drawn at random:

* without a root: ``2.25.<integer of a 128-bit UUID>`` (PS3.5 Annex B.2, UUID-derived UIDs);
  the UUID is the first 128 bits of SHA-256 over the parts, with the RFC 9562 version-8
  ("custom") and variant bits set;
* with an organisation's root: ``<root>.<decimal digest>``, the digest cut so the whole UID
  fits the 64-character limit of the UI value representation (PS3.5 section 6.2).
"""

from __future__ import annotations

import hashlib
import json
import re

from service.errors import UserError

#: maximum length of a UID (PS3.5 section 6.2, VR UI)
UID_MAX_LENGTH = 64
#: fewest decimal digits the digest part may have under a custom root (about 66 bits)
MIN_DIGEST_DIGITS = 20

_ROOT = re.compile(r"^(0|[1-9][0-9]*)(\.(0|[1-9][0-9]*))*$")
_UID = re.compile(r"^(0|[1-9][0-9]*)(\.(0|[1-9][0-9]*))+$")


def is_valid_uid(value: object) -> bool:
    """A UID as PS3.5 9.1 defines it: at most 64 characters, at least two dot-separated
    components of digits, none with a leading zero."""
    return isinstance(value, str) and len(value) <= UID_MAX_LENGTH and bool(_UID.match(value))


def _digest(parts: tuple[str, ...]) -> bytes:
    for p in parts:
        if not isinstance(p, str):
            raise UserError(f"UID parts must be strings, got {type(p).__name__}: {p!r}")
    if not parts:
        raise UserError("a UID needs at least one part to derive it from")
    # JSON keeps the boundaries between parts: ("a", "bc") and ("ab", "c") differ
    payload = json.dumps(list(parts), ensure_ascii=False, separators=(",", ":"))
    return hashlib.sha256(payload.encode("utf-8")).digest()


def validate_root(root: str) -> str:
    """Return ``root`` if it is usable as a UID root, else raise a clear :class:`UserError`."""
    if not isinstance(root, str) or not _ROOT.match(root):
        raise UserError(
            f"UID root {root!r} is not valid: use digits and dots only, no empty or "
            "zero-padded components (e.g. 1.2.826.0.1.3680043.10.1234)"
        )
    room = UID_MAX_LENGTH - len(root) - 1
    if room < MIN_DIGEST_DIGITS:
        raise UserError(
            f"UID root {root!r} is too long ({len(root)} characters): at most "
            f"{UID_MAX_LENGTH - 1 - MIN_DIGEST_DIGITS} characters leave room for a unique suffix"
        )
    return root


def derive_uid(*parts: str, root: str | None = None) -> str:
    """A UID determined by ``parts``: same parts, same UID; different parts, different UID
    (up to the collision odds of a 128-bit or 66+-bit hash)."""
    digest = _digest(parts)
    if root is None:
        value = int.from_bytes(digest[:16], "big")
        # RFC 9562: version 8 in bits 48-51, variant 0b10 in bits 64-65
        value &= ~(0xF << 76)
        value |= 0x8 << 76
        value &= ~(0x3 << 62)
        value |= 0x2 << 62
        return f"2.25.{value}"
    validate_root(root)
    room = UID_MAX_LENGTH - len(root) - 1
    suffix = int.from_bytes(digest, "big") % (10**room)
    return f"{root}.{suffix}"


def config_digest(obj: object) -> str:
    """Stable SHA-256 (hex) of a JSON-serialisable object; key order does not matter."""
    try:
        text = json.dumps(obj, sort_keys=True, ensure_ascii=False, separators=(",", ":"))
    except (TypeError, ValueError) as exc:
        raise UserError(f"configuration cannot be digested (not plain JSON data): {exc}") from exc
    return hashlib.sha256(text.encode("utf-8")).hexdigest()
