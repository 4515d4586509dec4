"""Who may use the HTTP API: the bearer token (from an environment variable or a file, re-read
on demand), the per-address limit on failed authentications, client addresses, TLS, and the
headers every answer carries.

Nothing here touches a socket; :mod:`streamcount.service.server` puts these pieces together.
"""

from __future__ import annotations

import hmac
import ipaddress
import logging
import math
import os
import ssl
import threading
import time
from collections import OrderedDict
from collections.abc import Callable, Mapping

from streamcount.errors import ConfigError, InputError, describe_os_error

__all__ = [
    "SECURITY_HEADERS",
    "AuthLimiter",
    "TokenSource",
    "bearer_matches",
    "client_key",
    "forwarded_client",
    "tls_context",
]

logger = logging.getLogger(__name__)

#: Sent with every answer unless the answer sets the header itself: no MIME sniffing, no
#: referrer leaving the page, never shown inside a frame (both the old header and the CSP
#: directive), and nothing kept in a cache (API answers describe a moving window).
SECURITY_HEADERS: dict[str, str] = {
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "X-Frame-Options": "DENY",
    "Content-Security-Policy": "frame-ancestors 'none'",
    "Cache-Control": "no-store",
}

#: shortest token accepted without a warning (bytes of text)
_SHORT_TOKEN = 16


def bearer_matches(headers: Mapping[str, str], token: str) -> bool:
    """Whether ``Authorization: Bearer <token>`` is among ``headers`` (names in any case).

    The comparison takes the same time however much of a guess matches.

    >>> bearer_matches({"authorization": "bearer s3cret"}, "s3cret")
    True
    >>> bearer_matches({"Authorization": "Basic s3cret"}, "s3cret")
    False
    """
    value = next((v for k, v in headers.items() if k.lower() == "authorization"), "")
    scheme, _, given = value.partition(" ")
    if scheme.lower() != "bearer":
        return False
    return hmac.compare_digest(given.strip().encode("utf-8"), token.encode("utf-8"))


class TokenSource:
    """The API token, read from an environment variable or a file; :meth:`reload` reads again.

    Parameters
    ----------
    env:
        Name of the environment variable (``server.token_env``); with ``token`` given too,
        only named in messages (the caller has read it).
    path:
        File holding the token (``server.token_file``); surrounding whitespace, such as the
        final newline, is not part of it. Only a file can change while the process runs, so
        only a file gives rotation without a restart.
    token:
        A token given directly (read by the caller, or in tests); never reloaded.

    Raises
    ------
    InputError
        At construction, when the variable is unset or empty, or the file cannot be read or
        is empty: a service must not start open when a token was asked for.
    """

    def __init__(
        self, *, env: str | None = None, path: str | None = None, token: str | None = None
    ) -> None:
        if (path is not None) == (env is not None or token is not None):
            raise ValueError("give the token's file, or its environment variable or value")
        self.env = env
        self.path = path
        self._token = token if token is not None else self._read()
        if not self._token:
            raise ValueError("the API token is empty; set a token or run without one")

    @property
    def current(self) -> str:
        """The token in force (a reference read; safe from any thread)."""
        return self._token

    def _read(self) -> str:
        if self.env is not None:
            value = os.environ.get(self.env, "")
            if not value:
                raise InputError(
                    f"server.token_env = {self.env!r}: that environment variable is not set "
                    "or empty"
                )
            return value
        assert self.path is not None
        try:
            with open(self.path, encoding="utf-8") as fh:
                value = fh.read(64 * 1024).strip()
        except (OSError, UnicodeDecodeError) as exc:
            reason = (
                describe_os_error("token", self.path, exc)
                if isinstance(exc, OSError)
                else f"token {self.path}: not UTF-8 text"
            )
            raise InputError(f"server.token_file = {self.path!r}: {reason}") from exc
        if not value:
            raise InputError(
                f"server.token_file = {self.path!r}: the file is empty; write the token in it"
            )
        if any(ch.isspace() for ch in value):
            raise InputError(
                f"server.token_file = {self.path!r}: the token holds whitespace; a bearer token "
                "is one word (e.g. from 'openssl rand -hex 32')"
            )
        if len(value) < _SHORT_TOKEN:
            logger.warning(
                "the API token in %s is shorter than %d characters; a longer random one "
                "(e.g. 'openssl rand -hex 32') is harder to guess",
                self.path,
                _SHORT_TOKEN,
            )
        return value

    def reload(self) -> bool:
        """Read the token again (SIGHUP); on any problem keep the one in force.

        Returns whether a new token is in force. Logs what happened, never the token.
        """
        if self.path is None:
            where = (
                f"server.token_env {self.env!r}: an environment variable cannot change in a "
                "running process"
                if self.env
                else "the code that started the server"
            )
            logger.warning(
                "token reload asked, but the token comes from %s; use server.token_file to "
                "rotate tokens without a restart",
                where,
            )
            return False
        try:
            value = self._read()
        except InputError as exc:
            logger.error("API token not reloaded, the old one stays in force: %s", exc)
            return False
        if value == self._token:
            logger.info("API token re-read from %s: unchanged", self.path)
            return False
        self._token = value
        logger.info("API token reloaded from %s: the new token is in force", self.path)
        return True


class AuthLimiter:
    """At most ``per_minute`` failed authentications per client address (a token bucket).

    Each failure takes one token from the address's bucket, which refills at ``per_minute``
    tokens a minute up to ``per_minute``; an address with an empty bucket is refused (429)
    until a token is back, whatever it sends, so a guessing client cannot try faster than
    ``per_minute`` guesses a minute. At most ``max_addresses`` addresses are remembered (the
    least recently seen ones are forgotten first), so memory stays bounded under a flood.

    Thread-safe.

    Examples
    --------
    >>> clock = iter([0.0, 0.0, 1.0, 31.0]).__next__
    >>> limiter = AuthLimiter(2, clock=clock)
    >>> limiter.failed("203.0.113.9"); limiter.failed("203.0.113.9")
    >>> limiter.retry_after("203.0.113.9")  # empty at t=1: one token back at t=30
    29
    >>> limiter.retry_after("203.0.113.9") is None  # t=31
    True
    """

    def __init__(
        self,
        per_minute: int,
        *,
        max_addresses: int = 10000,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        if per_minute < 1:
            raise ValueError(f"per_minute={per_minute!r} must be >= 1")
        self.per_minute = per_minute
        self._rate = per_minute / 60.0
        self._max = max_addresses
        self._clock = clock
        self._lock = threading.Lock()
        #: address -> (tokens left, when last updated)
        self._buckets: OrderedDict[str, tuple[float, float]] = OrderedDict()

    def _level(self, key: str, now: float) -> float:
        tokens, then = self._buckets.get(key, (float(self.per_minute), now))
        return min(float(self.per_minute), tokens + (now - then) * self._rate)

    def retry_after(self, key: str) -> int | None:
        """Whole seconds until ``key`` may try again, or ``None`` when it may now."""
        now = self._clock()
        with self._lock:
            if key not in self._buckets:
                return None
            level = self._level(key, now)
        if level >= 1.0:
            return None
        return max(1, math.ceil((1.0 - level) / self._rate))

    def failed(self, key: str) -> None:
        """Count one failed authentication from ``key``."""
        now = self._clock()
        with self._lock:
            level = self._level(key, now)
            self._buckets[key] = (max(0.0, level - 1.0), now)
            self._buckets.move_to_end(key)
            while len(self._buckets) > self._max:
                self._buckets.popitem(last=False)


def client_key(address: str) -> str:
    """The address limits are counted against: IPv4 as it is (also when IPv4-mapped), IPv6 by
    its /64 network (one host usually holds a whole /64); anything else as given.

    >>> client_key("::ffff:198.51.100.7"), client_key("2001:db8:1:2:aaaa::1")
    ('198.51.100.7', '2001:db8:1:2::/64')
    """
    try:
        ip = ipaddress.ip_address(address.split("%", 1)[0])
    except ValueError:
        return address
    if isinstance(ip, ipaddress.IPv6Address):
        if ip.ipv4_mapped is not None:
            return str(ip.ipv4_mapped)
        return str(ipaddress.IPv6Network((int(ip) >> 64 << 64, 64)))
    return str(ip)


def forwarded_client(headers: Mapping[str, str], peer: str) -> str:
    """Behind a reverse proxy: the last address of ``X-Forwarded-For`` (the one the proxy
    itself appended, so a client cannot forge it), else the peer.

    >>> forwarded_client({"x-forwarded-for": "6.6.6.6, 198.51.100.7"}, "127.0.0.1")
    '198.51.100.7'
    """
    value = next((v for k, v in headers.items() if k.lower() == "x-forwarded-for"), "")
    last = value.rsplit(",", 1)[-1].strip()
    try:
        ipaddress.ip_address(last)
    except ValueError:
        return peer
    return last


def tls_context(certificate: str, key: str) -> ssl.SSLContext:
    """A server-side TLS context (TLS 1.2 or later) holding ``certificate`` and ``key`` (PEM).

    Raises
    ------
    ConfigError
        Naming ``server.tls_certificate`` or ``server.tls_key`` when a file cannot be read,
        is not PEM, or the key does not belong to the certificate.
    """
    context = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    context.minimum_version = ssl.TLSVersion.TLSv1_2
    context.set_alpn_protocols(["http/1.1"])
    for name, path in (("server.tls_certificate", certificate), ("server.tls_key", key)):
        try:
            with open(path, "rb"):
                pass
        except OSError as exc:
            role = "TLS certificate" if name.endswith("certificate") else "TLS key"
            raise ConfigError(name, path, describe_os_error(role, path, exc)) from exc
    try:
        context.load_cert_chain(certificate, key)
    except ssl.SSLError as exc:
        raise ConfigError(
            "server.tls_certificate",
            certificate,
            f"with server.tls_key {key!r}: cannot be loaded ({exc.reason or exc}); both must be "
            "PEM files and the key must belong to the certificate",
        ) from exc
    return context
