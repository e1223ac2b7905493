"""InfluxDB sink, v2 write API (``/api/v2/write``) through influxdb-client: org, bucket, token.

For InfluxDB 2.x and 3.x and for servers that speak the same API (VictoriaMetrics). The
client's own retries are off: the forwarder retries, with backoff, from the outbox, so a
batch is never held in two queues. Its exceptions are translated into SinkUnavailable /
SinkRejected. Points are written in the ``v2`` line-protocol dialect.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from .config import Settings
from .errors import ConfigError, SinkUnavailable
from .lineprotocol import Dialect
from .outbox import Record, http_failure
from .sink_influx_v1 import _check_url, encode_batch, probe

__all__ = ["InfluxV2Sink"]


class InfluxV2Sink:
    """Writes facts to an InfluxDB bucket over the v2 API."""

    dialect: Dialect = "v2"

    def __init__(
        self,
        *,
        url: str,
        org: str,
        bucket: str,
        token: str,
        site: str,
        timeout_s: float = 10.0,
        verify_tls: bool = True,
        name: str = "influx",
    ) -> None:
        if not bucket:
            raise ConfigError("influx.bucket is empty: name the InfluxDB bucket to write to")
        self.name, self.site, self.url = name, site, _check_url(url)
        self.org, self.bucket, self._token = org, bucket, token
        self.timeout_s, self.verify_tls = timeout_s, verify_tls
        self._client: Any = None
        self._write: Any = None
        self._where = f"InfluxDB at {self.url} (org {org!r}, bucket {bucket!r})"

    @classmethod
    def from_settings(cls, settings: Settings, name: str = "influx") -> InfluxV2Sink:
        ix = settings.influx
        return cls(
            url=ix.url,
            org=ix.org,
            bucket=ix.bucket,
            token=ix.token.get_secret_value(),
            site=settings.site.id,
            timeout_s=ix.timeout_s,
            verify_tls=ix.verify_tls,
            name=name,
        )

    def open(self) -> None:
        """An empty write: checks the server answers, knows the bucket and takes the token.

        Servers check the token and the bucket before the body, so a 400 for the empty body
        itself (some servers want at least one point) still means we may write.
        """
        if self._client is None:
            from influxdb_client import InfluxDBClient
            from influxdb_client.client.write_api import SYNCHRONOUS

            self._client = InfluxDBClient(
                url=self.url,
                token=self._token,
                org=self.org,
                timeout=int(self.timeout_s * 1000),
                verify_ssl=self.verify_tls,
                enable_gzip=False,  # it would gzip-label the empty probe body too
                retries=False,
            )
            self._write = self._client.write_api(write_options=SYNCHRONOUS)
        probe(self._post)

    def write(self, batch: Sequence[Record]) -> None:
        body = encode_batch(batch, self.site, self.dialect)
        if body:
            if self._write is None:
                raise SinkUnavailable(f"{self._where}: write before open()")
            self._post(body)

    def close(self) -> None:
        if self._client is not None:
            self._client.close()
            self._client = self._write = None

    def _post(self, body: bytes) -> None:
        from influxdb_client.client.exceptions import InfluxDBError
        from influxdb_client.domain.write_precision import WritePrecision
        from urllib3.exceptions import HTTPError as Urllib3Error

        try:
            self._write.write(
                bucket=self.bucket, org=self.org, record=body, write_precision=WritePrecision.MS
            )
        except InfluxDBError as exc:
            # ApiException carries status/body/headers; a bare InfluxDBError its response.
            status = getattr(exc, "status", None) or getattr(exc.response, "status", 0)
            headers = getattr(exc, "headers", None) or {}
            raise http_failure(
                int(status or 0),
                getattr(exc, "body", None) or exc.message,
                headers.get("Retry-After") if hasattr(headers, "get") else None,
                where=self._where,
                auth_hint="check influx.token (or token_file) and that it may write to the bucket",
                missing_hint="create the bucket or fix influx.org / influx.bucket",
            ) from exc
        except (Urllib3Error, OSError) as exc:
            raise SinkUnavailable(
                f"{self._where} does not answer ({type(exc).__name__}: {exc}); check influx.url"
                " and that it runs"
            ) from exc
