"""InfluxDB sink, v1 write API: ``POST /write?db=..&rp=..&precision=ms``.

Works with InfluxDB 1.x and with the 1.x compatibility API of later versions (for InfluxDB
3.x put the token in ``influx.password``). Credentials go in an ``Authorization: Basic``
header, never in the URL (URLs end up in logs). Plain ``urllib``, no extra dependency; no
proxy from the environment (the database sits on the barn network).

Points are written in the ``v1`` line-protocol dialect, which every server reads the same.
"""

from __future__ import annotations

import base64
import gzip
import http.client
import ssl
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Callable, Sequence

from .config import Settings
from .errors import ConfigError, SinkRejected, SinkUnavailable
from .lineprotocol import PRECISION, Dialect, points_for
from .outbox import Record, http_failure

__all__ = ["InfluxV1Sink", "encode_batch", "probe"]

# Bodies above this are gzipped (InfluxDB 1.x and later accept Content-Encoding: gzip).
_GZIP_FROM = 4096


def encode_batch(batch: Sequence[Record], site: str, dialect: Dialect) -> bytes:
    """A batch as a line-protocol body; a fact that cannot be written raises SinkRejected."""
    lines: list[str] = []
    for r in batch:
        try:
            lines.extend(p.line(dialect) for p in points_for(r.fact, site))
        except (LookupError, ValueError, TypeError) as exc:
            raise SinkRejected(
                f"fact {r.id} ({r.kind}) cannot be written: {exc}", "unconvertible"
            ) from exc
    return "\n".join(lines).encode("utf-8")


class _NoRedirect(urllib.request.HTTPRedirectHandler):
    """A redirected write is not an acknowledged write (a proxy's login page answers 200)."""

    def redirect_request(self, *args: object, **kwargs: object) -> None:
        return None


def probe(post: Callable[[bytes], None]) -> None:
    """POST an empty body; a 400 for the empty body itself still means we may write."""
    try:
        post(b"")
    except SinkRejected as exc:
        if exc.cause != "bad_point":
            raise


def _check_url(url: str) -> str:
    parts = urllib.parse.urlsplit(url)
    if parts.scheme not in ("http", "https") or not parts.hostname:
        raise ConfigError(
            f"influx.url = {url!r} is not an http(s) URL such as http://127.0.0.1:8086"
        )
    return url.rstrip("/")


class InfluxV1Sink:
    """Writes facts to an InfluxDB database (and retention policy) over the v1 API."""

    dialect: Dialect = "v1"

    def __init__(
        self,
        *,
        url: str,
        database: str,
        site: str,
        retention_policy: str = "",
        username: str = "",
        password: str = "",
        timeout_s: float = 10.0,
        verify_tls: bool = True,
        name: str = "influx",
    ) -> None:
        if not database:
            raise ConfigError("influx.database is empty: name the InfluxDB database to write to")
        self.name, self.site, self.url = name, site, _check_url(url)
        self.database, self.timeout_s = database, timeout_s
        query = {"db": database, "precision": PRECISION}
        if retention_policy:
            query["rp"] = retention_policy
        self._write_url = f"{self.url}/write?{urllib.parse.urlencode(query)}"
        self._headers = {"Content-Type": "text/plain; charset=utf-8"}
        if username or password:
            cred = base64.b64encode(f"{username}:{password}".encode()).decode("ascii")
            self._headers["Authorization"] = f"Basic {cred}"
        handlers: list[urllib.request.BaseHandler] = [
            urllib.request.ProxyHandler({}),
            _NoRedirect(),
        ]
        if not verify_tls:
            handlers.append(urllib.request.HTTPSHandler(context=ssl._create_unverified_context()))
        self._opener = urllib.request.build_opener(*handlers)
        self._where = f"InfluxDB at {self.url} (database {database!r})"

    @classmethod
    def from_settings(cls, settings: Settings, name: str = "influx") -> InfluxV1Sink:
        ix = settings.influx
        return cls(
            url=ix.url,
            database=ix.database,
            site=settings.site.id,
            retention_policy=ix.retention_policy,
            username=ix.username,
            password=ix.password.get_secret_value(),
            timeout_s=ix.timeout_s,
            verify_tls=ix.verify_tls,
            name=name,
        )

    def open(self) -> None:
        """An empty write: checks the server answers, knows the database and takes our login."""
        probe(self._post)

    def write(self, batch: Sequence[Record]) -> None:
        body = encode_batch(batch, self.site, self.dialect)
        if body:
            self._post(body)

    def close(self) -> None:
        """Nothing held open: each request has its own connection."""

    def _post(self, body: bytes) -> None:
        headers = dict(self._headers)
        if len(body) >= _GZIP_FROM:
            body = gzip.compress(body, compresslevel=5)
            headers["Content-Encoding"] = "gzip"
        req = urllib.request.Request(self._write_url, data=body, method="POST", headers=headers)
        try:
            with self._opener.open(req, timeout=self.timeout_s) as resp:
                resp.read(65536)
        except urllib.error.HTTPError as exc:
            with exc:  # the error holds the response and its socket
                detail = exc.read(4096) if exc.fp is not None else b""
            raise http_failure(
                exc.code,
                detail or exc.headers.get("X-Influxdb-Error", ""),
                exc.headers.get("Retry-After"),
                where=self._where,
                auth_hint="check influx.username and influx.password (or password_file)",
                missing_hint=(
                    f'create it (CREATE DATABASE "{self.database}") or fix influx.database'
                    " / influx.retention_policy"
                ),
            ) from exc
        except (urllib.error.URLError, OSError, http.client.HTTPException) as exc:
            reason = getattr(exc, "reason", exc)
            raise SinkUnavailable(
                f"{self._where} does not answer ({reason}); check influx.url and that it runs"
            ) from exc
