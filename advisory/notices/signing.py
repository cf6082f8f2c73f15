"""Webhook signatures: the ``X-Advisory-*`` headers, :func:`sign` and :func:`verify_signature`.

Header ``X-Advisory-Timestamp`` holds the Unix time of sending; ``X-Advisory-Signature`` holds
``hmac-sha256=<hex>``, the HMAC-SHA256 with the shared secret over ``<timestamp>.`` followed by
the raw body bytes, so neither the body nor the time can be changed or replayed later.
"""

from __future__ import annotations

import hashlib
import hmac
import time

SIGNATURE_HEADER = "X-Advisory-Signature"
TIMESTAMP_HEADER = "X-Advisory-Timestamp"
NOTICE_HEADER = "X-Advisory-Notice"
DELIVERY_HEADER = "X-Advisory-Delivery"
SIGNATURE_PREFIX = "hmac-sha256="


def sign(secret: str, timestamp: str | int, body: bytes) -> str:
    """The signature header value for a body sent at ``timestamp`` (Unix seconds)."""
    mac = hmac.new(secret.encode("utf-8"), f"{timestamp}.".encode("ascii") + body, hashlib.sha256)
    return SIGNATURE_PREFIX + mac.hexdigest()


def verify_signature(secret: str, body: bytes, signature: str | None, timestamp: str | None, *,
                     max_age_s: float | None = 300.0, now: float | None = None) -> bool:
    """Check a webhook delivery (for receivers and tests).

    Parameters
    ----------
    secret : str
        The shared secret.
    body : bytes
        The raw request body, exactly as received.
    signature, timestamp : str
        Values of the ``X-Advisory-Signature`` and ``X-Advisory-Timestamp`` headers.
    max_age_s : float or None
        Reject deliveries older (or further in the future) than this [s]; None to skip the check.
    now : float, optional
        Current Unix time (default: the clock).

    Returns
    -------
    bool
        True when the signature matches (compared in constant time) and the time is fresh.
    """
    if not signature or not timestamp or not secret:
        return False
    try:
        ts = int(timestamp)
    except ValueError:
        return False
    if max_age_s is not None:
        now = time.time() if now is None else now
        if abs(now - ts) > max_age_s:
            return False
    return hmac.compare_digest(sign(secret, timestamp, body), signature.strip())

