"""Control endpoints given on the command line or to the API, checked before anything starts.

ZeroMQ answers a malformed endpoint with "Invalid argument" only when a socket binds or
connects, after the run directory exists; these checks say what is wrong, and what was
probably meant, first.
"""

from __future__ import annotations

import re

from topologies._errors import SwarmrigError

__all__ = ["EndpointError", "check_endpoint"]

# tcp://HOST:PORT; HOST a name, an IPv4 address, [IPv6] or * (bind only); PORT 1-65535 or *
_TCP = re.compile(r"tcp://(?P<host>\[[0-9A-Fa-f:.]+\]|[^\s/:\[\]]+):(?P<port>\d{1,5}|\*)")
_BARE = re.compile(r"(\[[0-9A-Fa-f:.]+\]|[^\s/:\[\]]+):(\d{1,5}|\*)")


class EndpointError(SwarmrigError):
    """A control endpoint that cannot be bound or joined as written."""


def check_endpoint(text: str, *, option: str, bind: bool) -> str:
    """``text`` if it is a ``tcp://HOST:PORT`` (or ``ipc://PATH``) endpoint, else EndpointError.

    ``option`` names where it came from (``"--listen"``); ``bind`` allows the wildcards a
    bind takes (``tcp://*:5570``, ``tcp://0.0.0.0:*``) and refuses them for a join. The
    message gives the corrected form when only the ``tcp://`` prefix is missing.
    """
    example = "tcp://0.0.0.0:5570" if bind else "tcp://lab-pc:5570"
    expected = f"expected tcp://HOST:PORT, e.g. {example}"
    if not isinstance(text, str) or not text:
        raise EndpointError(f"{option}: {expected}, got nothing")
    shown = text if len(text) <= 80 else text[:76] + "..."
    if text.startswith("ipc://"):
        if len(text) == len("ipc://"):
            raise EndpointError(f"{option} {shown}: expected ipc://PATH, with a path")
        return text
    m = _TCP.fullmatch(text)
    if m is None:
        hint = ""
        if _BARE.fullmatch(text):
            hint = f" (did you mean tcp://{text}?)"
        elif "://" in text:
            hint = f" (the scheme {text.split('://', 1)[0]}:// is not one ZeroMQ binds here)"
        raise EndpointError(f"{option} {shown}: {expected}{hint}")
    host, port = m["host"], m["port"]
    if port == "*" or host == "*":
        if not bind:
            raise EndpointError(
                f"{option} {shown}: a wildcard host or port can be bound, not joined; {expected}"
            )
        return text
    if not 1 <= int(port) <= 65535:
        raise EndpointError(f"{option} {shown}: port {int(port)} is not in 1..65535")
    return text
