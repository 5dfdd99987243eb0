"""The optional checkpoint key: read from the environment (never the job file), and the HMAC it signs with.

``SHARDMILL_CHECKPOINT_KEY`` holds the key as hexadecimal digits, or ``SHARDMILL_CHECKPOINT_KEY_FILE`` names a file
that does. ``checkpoint.py`` tags each checkpoint's manifest and each model file with :func:`hmac_sha256` under it.
"""

from __future__ import annotations

import hashlib
import hmac
import os
from pathlib import Path

from shardmill.errors import JobError

KEY_ENV = "SHARDMILL_CHECKPOINT_KEY"
"""Environment variable holding the checkpoint key as hexadecimal digits (at least 32: 16 bytes)."""
KEY_FILE_ENV = "SHARDMILL_CHECKPOINT_KEY_FILE"
"""Environment variable naming a file that holds the checkpoint key as hexadecimal digits (the safer of the two:
an environment variable's value can be read by other processes of the same user)."""
MIN_KEY_BYTES = 16


def hmac_sha256(key: bytes, message: bytes) -> str:
    """HMAC-SHA-256 of ``message`` under ``key`` (RFC 2104 with SHA-256), as 64 hex digits."""
    return hmac.new(key, message, hashlib.sha256).hexdigest()


def configured_key() -> bytes | None:
    """The checkpoint key from :data:`KEY_ENV` or :data:`KEY_FILE_ENV`, or None when neither is set.

    A key that cannot be used is refused in one line that never shows the key itself.
    """
    given, file = os.environ.get(KEY_ENV), os.environ.get(KEY_FILE_ENV)
    if given is not None and file is not None:
        raise JobError(f"set one of {KEY_ENV} and {KEY_FILE_ENV}, not both")
    source = KEY_ENV
    if file is not None:
        source = f"{KEY_FILE_ENV} ({str(file)[:80]!r})"
        try:
            given = Path(file).read_text(errors="replace")
        except OSError as err:
            raise JobError(f"{source}: the key file cannot be read: {err.strerror or err}") from None
    if given is None:
        return None
    try:
        key = bytes.fromhex(given.strip())
    except ValueError:
        raise JobError(f"{source} must hold the key as hexadecimal digits (e.g. from "
                              f"`python -c 'import secrets; print(secrets.token_hex(32))'`); it holds other "
                              f"characters") from None
    if len(key) < MIN_KEY_BYTES:
        raise JobError(f"{source} holds a key of {len(key)} bytes; at least {MIN_KEY_BYTES} bytes "
                              f"({2 * MIN_KEY_BYTES} hex digits) are needed")
    return key
