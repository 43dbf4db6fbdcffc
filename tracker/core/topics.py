"""The MQTT topics of the wire contract, named in one place.

Every topic the daemon reads or writes is ``{root}/...``; :class:`Topics` builds them from the root
so that no module writes a topic string by hand.
"""

from __future__ import annotations

from dataclasses import dataclass

#: The topic root when none is configured.
DEFAULT_ROOT = "tracker"


@dataclass(frozen=True, slots=True)
class Topics:
    """The topics under one root.

    Args:
        root: The topic root (no leading or trailing ``/``; checked by the shell's settings).
    """

    root: str = DEFAULT_ROOT

    # Inbound.
    def orders(self, order_id: str = "+") -> str:
        """Order messages of one order (``+``: every order)."""
        return f"{self.root}/orders/{order_id}"

    def fills(self, order_id: str = "+") -> str:
        """Fills of one order (``+``: every order)."""
        return f"{self.root}/fills/{order_id}"

    def bins(self, symbol: str = "+") -> str:
        """Closed market bins of one symbol (``+``: every symbol)."""
        return f"{self.root}/bins/{symbol}"

    @property
    def control(self) -> str:
        """Halt and resume commands."""
        return f"{self.root}/control"

    @property
    def tick(self) -> str:
        """The clock ticks the shells inject (journaled, never sent by others)."""
        return f"{self.root}/tick"

    @property
    def inbound(self) -> tuple[str, ...]:
        """The subscriptions of the daemon."""
        return (self.orders(), self.fills(), self.bins(), self.control)

    # Outbound.
    def targets(self, order_id: str = "+") -> str:
        """Per-bin targets of one order."""
        return f"{self.root}/targets/{order_id}"

    def status(self, order_id: str = "+") -> str:
        """The retained status of one order."""
        return f"{self.root}/status/{order_id}"

    def alerts(self, order_id: str | None = "+") -> str:
        """Alerts of one order; ``None``: the engine's own alerts (no order, no symbol)."""
        return self.symbol_alerts(None) if order_id is None else f"{self.root}/alerts/{order_id}"

    def symbol_alerts(self, symbol: str | None = "+") -> str:
        """Alerts about a whole symbol (``{root}/alerts/symbol/{symbol}``); ``None``: the engine's
        own alerts (``{root}/alerts/engine/all``). Two levels below ``alerts``, so they never
        meet an order's alerts, and ``{root}/alerts/#`` catches all of them."""
        if symbol is None:
            return f"{self.root}/alerts/engine/all"
        return f"{self.root}/alerts/symbol/{symbol}"

    def acks(self, order_id: str = "+") -> str:
        """The reply to each order message of one order (accepted or rejected, and why)."""
        return f"{self.root}/acks/{order_id}"

    @property
    def errors(self) -> str:
        """Every rejected inbound message."""
        return f"{self.root}/errors"

    def health(self, instance: str = "+") -> str:
        """The retained health of one daemon instance."""
        return f"{self.root}/health/{instance}"

    def split_inbound(self, topic: str) -> tuple[str, str | None] | None:
        """The kind and the last level of an inbound topic, or ``None`` when it is not one.

        ``("orders", order_id)``, ``("fills", order_id)``, ``("bins", symbol)``,
        ``("control", None)`` or ``("tick", None)``.
        """
        prefix = f"{self.root}/"
        if not topic.startswith(prefix):
            return None
        levels = topic[len(prefix) :].split("/")
        kind = levels[0]
        if kind in ("control", "tick") and len(levels) == 1:
            return kind, None
        if kind in ("orders", "fills", "bins") and len(levels) == 2 and levels[1]:
            return kind, levels[1]
        return None

    def order_id_of(self, topic: str) -> str | None:
        """The order id in an inbound order or fill topic, else ``None``."""
        for kind in ("orders", "fills"):
            prefix = f"{self.root}/{kind}/"
            if topic.startswith(prefix):
                candidate = topic[len(prefix) :]
                if "/" not in candidate and 0 < len(candidate) <= 64:
                    return candidate
        return None


__all__ = ["DEFAULT_ROOT", "Topics"]
