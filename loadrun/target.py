"""Target: where requests go (base URL, model, the NAME of the variable holding the key)."""

from __future__ import annotations

import ipaddress
import os
from dataclasses import dataclass, field

from loadrun.errors import UsageError
from loadrun.transports.base import Endpoint


@dataclass(frozen=True, slots=True)
class Target:
    base_url: str
    model: str
    api_key_env: str | None = None
    """Name of the environment variable that holds the API key; the key itself is never stored."""
    name: str = "target"
    headers: tuple[tuple[str, str], ...] = ()
    verify_tls: bool = True
    embedded: bool = False
    """True when this is the bundled mock that loadrun started itself."""
    endpoint: Endpoint = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "endpoint", Endpoint.parse(self.base_url))
        if not self.model:
            raise UsageError("a target needs a model name (--model)")

    @property
    def is_loopback(self) -> bool:
        return is_loopback_host(self.endpoint.host)

    def api_key(self) -> str | None:
        """Read the key from the named variable; a named but unset variable is an error."""
        if not self.api_key_env:
            return None
        value = os.environ.get(self.api_key_env)
        if not value:
            raise UsageError(f"environment variable {self.api_key_env} (named by --api-key-env) is not set")
        return value

    def describe(self) -> dict[str, object]:
        """What may be written to results: never the key, only the variable's name."""
        return {
            "name": self.name,
            "base_url": self.base_url,
            "model": self.model,
            "api_key_env": self.api_key_env,
            "embedded_mock": self.embedded,
        }


def is_loopback_host(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False
