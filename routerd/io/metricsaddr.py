"""The address of a Prometheus page: ``HOST:PORT`` as the config and flags give it, and
the URL a bound page is shown at.

Owns: the one rule for ``service.metrics`` and ``agent.metrics`` (:func:`parse_address`)
and the page URL the service, the shard front and tests print (:func:`page_url`).  The
service (:mod:`routerd.service.metrics`), the shard front and the agent
(:mod:`routerd.agent.forwarder`) read it here, so the agent needs nothing of the service.
Starting the page is prometheus_client's ``start_http_server`` in each of them.

Must not import: anything of routerd but :mod:`routerd.io.values`, prometheus_client,
sockets.
"""
from __future__ import annotations

from . import values as _values

__all__ = ["page_url", "parse_address"]


def parse_address(addr: str) -> tuple[str, int]:
    """``HOST:PORT`` (``[v6]:PORT`` too) → (host, port); ValueError naming the rule
    (the one HOST:PORT rule, :func:`routerd.io.values.parse_address`)."""
    try:
        return _values.parse_address(addr)
    except ValueError as e:
        raise ValueError(f"metrics {e}") from None


def page_url(host: str, port: int) -> str:
    """``http://HOST:PORT/metrics``, an IPv6 host in brackets."""
    shown = f"[{host}]" if ":" in host else host
    return f"http://{shown}:{port}/metrics"
