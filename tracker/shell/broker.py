"""An embedded MQTT broker for ``tracker demo``: amqtt (pure Python) on a free loopback port.

The demo must run with no outside service, so it starts this broker in its own event loop, points
the daemon and the scripted market at it, and stops it at the end. It listens on 127.0.0.1 only.

What amqtt 0.12.1 does and does not do, as checked with aiomqtt/paho clients on loopback (the
tests in ``tests/test_demo.py`` keep checking it):

* QoS 1 in and out, retained messages and last wills work.
* Persistent sessions (``clean_session=False``) keep subscriptions, but amqtt queues messages for a
  disconnected session only if the session is *not anonymous*; its stock anonymous-auth plugin
  marks every client anonymous. :class:`OpenLoopbackAuth` below accepts every client without that
  mark, so a daemon that reconnects gets what was published while it was away.
* On every connect amqtt also sends the connecting client the retained messages of *every*
  subscription known to the broker, whoever made it (at QoS 0, retain flag set). A client may
  therefore receive messages on topics it never subscribed to; :mod:`tracker.shell.bus` drops
  anything outside its own subscriptions for that reason (and any client of the demo should do the
  same).
"""

from __future__ import annotations

import asyncio
import logging
import socket
from dataclasses import dataclass
from types import TracebackType
from typing import Any, Self

from amqtt.broker import Broker
from amqtt.plugins.base import BaseAuthPlugin
from amqtt.session import Session

__all__ = ["EmbeddedBroker", "OpenLoopbackAuth"]

#: Seconds allowed for the broker to start or to shut down.
START_TIMEOUT = 10.0
STOP_TIMEOUT = 10.0


class OpenLoopbackAuth(BaseAuthPlugin):  # type: ignore[misc]  # amqtt ships no type hints
    """Accept every client (the broker listens on loopback only) as a non-anonymous session."""

    @dataclass
    class Config:
        """No options."""

    async def authenticate(self, *, session: Session) -> bool:
        """Every client is welcome; the session stays non-anonymous so it can queue messages."""
        del session
        return True


class EmbeddedBroker:
    """An amqtt broker on ``127.0.0.1`` and a free port, as an async context manager.

    Args:
        port: The port to listen on; 0 (the default) picks a free one.
        quiet: Turn amqtt's own logging down to warnings.

    Example::

        async with EmbeddedBroker() as broker:
            print(broker.url)  # mqtt://127.0.0.1:PORT
    """

    def __init__(self, port: int = 0, *, quiet: bool = True) -> None:
        self._requested_port = port
        self._quiet = quiet
        self._broker: Broker | None = None
        self.host = "127.0.0.1"
        self.port = port

    @property
    def url(self) -> str:
        """``mqtt://127.0.0.1:PORT`` of the running broker."""
        return f"mqtt://{self.host}:{self.port}"

    async def start(self) -> None:
        """Start listening; :attr:`port` then holds the port chosen."""
        if self._quiet:
            logging.getLogger("amqtt").setLevel(logging.WARNING)
            logging.getLogger("transitions").setLevel(logging.WARNING)
        config: dict[str, Any] = {
            "listeners": {
                "default": {"type": "tcp", "bind": f"{self.host}:{self._requested_port}"}
            },
            "plugins": {f"{__name__}.OpenLoopbackAuth": {}},
        }
        broker = Broker(config)
        await asyncio.wait_for(broker.start(), timeout=START_TIMEOUT)
        self._broker = broker
        self.port = _listening_port(broker)

    async def stop(self) -> None:
        """Shut the broker down (clients are disconnected)."""
        broker, self._broker = self._broker, None
        if broker is not None:
            await asyncio.wait_for(broker.shutdown(), timeout=STOP_TIMEOUT)

    async def __aenter__(self) -> Self:
        await self.start()
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        await self.stop()


def _listening_port(broker: Broker) -> int:
    """The TCP port the broker's default listener is bound to."""
    server = broker._servers["default"].instance  # amqtt keeps its asyncio.Server here
    for sock in getattr(server, "sockets", ()):
        if sock.family == socket.AF_INET:
            return int(sock.getsockname()[1])
    raise RuntimeError("the embedded broker did not bind an IPv4 port")
