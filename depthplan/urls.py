"""Storage URLs without their secrets: redaction for messages and files, scrubbing of driver errors.

Base-level (standard library only) so that the config check and the sweep store share one rule.
"""
from __future__ import annotations

import re
import urllib.parse

__all__ = ["SECRET_WORDS", "redact", "url_secrets", "scrub", "has_credentials", "split_url"]


#: A query key whose lower-cased name holds one of these words carries a secret (`password`,
#: `sslpassword`, `pgpass_token`, ...); its value is never written or printed.
SECRET_WORDS = ("password", "passwd", "pwd", "secret", "token")


def _is_secret_key(key: str) -> bool:
    name = urllib.parse.unquote_plus(key).lower()
    return any(word in name for word in SECRET_WORDS)


def split_url(url: str) -> tuple[str, str, str, str] | None:
    """(scheme, netloc, path, rest) where rest is '?query#fragment' as written; None if not a URL."""
    if "://" not in url:
        return None
    scheme, tail = url.split("://", 1)
    cut = min((i for i in (tail.find("/"), tail.find("?"), tail.find("#")) if i >= 0), default=len(tail))
    # a password may hold an unencoded '/', '?' or '#': the netloc runs to the last '@' before the path
    at = tail.rfind("@")
    if at >= cut:
        cut = min((i for i in (tail.find("/", at), tail.find("?", at), tail.find("#", at)) if i >= 0),
                  default=len(tail))
    netloc, after = tail[:cut], tail[cut:]
    q = min((i for i in (after.find("?"), after.find("#")) if i >= 0), default=len(after))
    return scheme, netloc, after[:q], after[q:]


def _redact_query(rest: str) -> str:
    """'?a=1&password=x#f' -> '?a=1&password=***#f' (other pairs kept as written)."""
    if not rest.startswith("?"):
        return rest
    query, hash_, fragment = rest[1:].partition("#")
    pairs = []
    for pair in re.split(r"([&;])", query):
        key, eq, _ = pair.partition("=")
        pairs.append(f"{key}=***" if eq and _is_secret_key(key) else pair)
    return "?" + "".join(pairs) + hash_ + fragment


def redact(url: str) -> str:
    """The URL with its password (in the authority or any secret query key) replaced by ***.

    `postgresql://u:pw@h/db?sslmode=require&sslpassword=x` becomes
    `postgresql://u:***@h/db?sslmode=require&sslpassword=***`; a URL without a
    password comes back unchanged.
    """
    parts = split_url(url)
    if parts is None:
        return url
    scheme, netloc, path, rest = parts
    if "@" in netloc:
        auth, host = netloc.rsplit("@", 1)
        if ":" in auth:
            netloc = f"{auth.split(':', 1)[0]}:***@{host}"
    return f"{scheme}://{netloc}{path}{_redact_query(rest)}"


def url_secrets(url: str | None) -> set[str]:
    """Every string a driver or library may print that gives away a password of `url`.

    The password as written, percent-decoded and percent-encoded; each secret
    query value the same ways; and, when a password holds an unencoded '@'
    (which makes drivers read its tail as part of the host name), every tail
    after such an '@' followed by '@', and every head before one of 4 or more characters.
    """
    out: set[str] = set()
    parts = split_url(url or "")
    if parts is None:
        return out
    _, netloc, _, rest = parts
    values: list[str] = []
    if "@" in netloc:
        auth = netloc.rsplit("@", 1)[0]
        if ":" in auth:
            password = auth.split(":", 1)[1]
            values.append(password)
            for i, ch in enumerate(password):
                if ch == "@":
                    out.add(password[i + 1:] + "@")
                    if i >= 4:  # a shorter head is not told apart from ordinary text (drivers do not print it)
                        out.add(password[:i])
    query = rest[1:].partition("#")[0] if rest.startswith("?") else ""
    for pair in re.split(r"[&;]", query):
        key, eq, value = pair.partition("=")
        if eq and _is_secret_key(key):
            values.append(value)
    for v in values:
        out.update({v, urllib.parse.unquote(v), urllib.parse.unquote_plus(v), urllib.parse.quote(v, safe="")})
    return {s for s in out if s and s != "@"}


def scrub(message: str, *urls: str | None) -> str:
    """`message` with every URL in `urls` redacted and every form of their passwords replaced by ***."""
    for url in urls:
        if url:
            message = message.replace(url, redact(url))
    secrets = set().union(*(url_secrets(u) for u in urls)) if urls else set()
    for secret in sorted(secrets, key=len, reverse=True):
        if secret.endswith("@") and len(secret) > 1:
            message = message.replace(secret, "***@")
        else:
            message = message.replace(secret, "***")
    return message


def has_credentials(url: str) -> bool:
    """True when the URL carries a password in its authority or a secret query key."""
    return bool(url_secrets(url)) or redact(url) != url
