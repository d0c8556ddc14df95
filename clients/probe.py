"""Is a service there? One `status` request on the control socket with a short timeout, before a client
starts anything (a driver that publishes, a recorder that creates its file)."""

from __future__ import annotations

from typing import Any

from twistrate.clients.link import Endpoints, Link, LinkTimeoutError
from twistrate.solver.errors import TwistrateError

#: How long a client waits for the service's `status` reply before it says that none answers, s.
PROBE_TIMEOUT_S = 2.0


class NoServiceError(TwistrateError):
    """No service answers on the control endpoint."""


def probe(endpoints: Endpoints, timeout_s: float = PROBE_TIMEOUT_S, **link_kw: Any) -> dict[str, Any]:
    """The service's `status` result. Raises NoServiceError (one clear line) when none answers within
    timeout_s."""
    with Link(endpoints, topics=(), timeout_s=timeout_s, **link_kw) as link:
        try:
            return link.status()
        except LinkTimeoutError:
            raise NoServiceError(f"no service answers on {endpoints.control} within {timeout_s:g} s (is "
                                 "`twistrate serve` running with this configuration?)") from None
