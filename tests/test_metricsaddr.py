"""routerd.io.metricsaddr: the metrics page address rule and the URL shown for a page."""
from __future__ import annotations

import pytest

from routerd.io import metricsaddr
from routerd.service import metrics


def test_one_rule_for_the_service_and_the_agent() -> None:
    # the service's name for it is this module's function, not a second copy
    assert metrics.parse_address is metricsaddr.parse_address
    assert metricsaddr.parse_address("0.0.0.0:9308") == ("0.0.0.0", 9308)
    with pytest.raises(ValueError, match=r"'localhost' is not HOST:PORT"):
        metricsaddr.parse_address("localhost")


def test_page_url_brackets_ipv6_hosts() -> None:
    assert metricsaddr.page_url("127.0.0.1", 9307) == "http://127.0.0.1:9307/metrics"
    assert metricsaddr.page_url("::1", 0) == "http://[::1]:0/metrics"
