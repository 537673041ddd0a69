"""Every error sluice raises, under one base class.

    SluiceError
    ├── ConfigError            a job file, variable or flag is invalid (names the key)
    ├── UrlError               a URL cannot be parsed, has a bad scheme, or is too long
    ├── StoreError             the frontier store failed
    │   ├── StoreUnavailable   Redis went away or timed out (nothing acknowledged is lost)
    │   └── LeaseNotHeld       a lease was completed after it expired or was never held
    ├── RedisLaunchError       the embedded Redis server could not be started
    ├── FolderInUse            a state or output folder belongs to another running sluice
    ├── AddressRefused         the SSRF guard refused a destination address
    ├── FetchError             a fetch ended without a usable response (carries a reason)
    └── DiskFault              the output folder cannot be written (full, gone, read-only)

Third-party errors (redis-py, aiohttp) are translated at the boundary where they
happen, so callers catch sluice errors only.
"""

from __future__ import annotations


class SluiceError(Exception):
    """Base class of every sluice error."""


class ConfigError(SluiceError):
    """An invalid setting; the message names the key and the reason."""


class UrlError(SluiceError):
    """A URL that cannot be admitted; ``reason`` is a short machine-readable word."""

    def __init__(self, reason: str, detail: str = "") -> None:
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason


class StoreError(SluiceError):
    """The frontier store failed."""


class StoreUnavailable(StoreError):
    """Redis is unreachable or timed out. Calls already acknowledged are durable."""


class LeaseNotHeld(StoreError):
    """A completion named a lease that expired, was reaped, or never existed."""


class RedisLaunchError(SluiceError):
    """The embedded Redis server could not be started."""


class FolderInUse(SluiceError):
    """A folder is locked by another running sluice; ``owner`` describes it (or is None)."""

    def __init__(self, message: str, owner: object = None) -> None:
        super().__init__(message)
        self.owner = owner


class AddressRefused(SluiceError):
    """The SSRF guard refused a destination; ``reason`` says why."""

    def __init__(self, reason: str, detail: str = "") -> None:
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason


class FetchError(SluiceError):
    """A fetch failed; ``reason`` is a short word, ``retryable`` says if a retry may help."""

    def __init__(self, reason: str, detail: str = "", *, retryable: bool = False) -> None:
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason
        self.retryable = retryable


class DiskFault(SluiceError):
    """The output folder cannot take more writes (ENOSPC, EDQUOT, EROFS, vanished).

    A worker that meets one stops leasing, hands what it holds back as retry-able, and
    exits non-zero; nothing written before it is torn.
    """
