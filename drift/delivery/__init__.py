"""Delivery: alert state, the outbox, and the channels that carry notices (e-mail, folder, webhook).

Flow: :func:`drift.delivery.alerts.process_alerts` turns a check outcome into alert rows and outbox rows
(one transaction per model); :func:`drift.delivery.outbox.deliver_pending` sends due outbox rows through
their channels with retries and the "never twice" rule. Names are re-exported lazily so that importing
this package stays cheap (charts pull in matplotlib only when drawn).
"""

from __future__ import annotations

import importlib
from typing import Any

# public name -> submodule of drift.delivery that defines it
_EXPORTS: dict[str, str] = {
    "process_alerts": "alerts",
    "open_alerts": "alerts",
    "cleared_alerts": "alerts",
    "AlertEvent": "alerts",
    "AlertRecord": "alerts",
    "deliver_pending": "outbox",
    "DeliveryReport": "outbox",
    "outbox_summary": "outbox",
    "resolve_uncertain": "outbox",
    "register_channel": "outbox",
    "Channel": "outbox",
    "render": "messages",
}

__all__ = list(_EXPORTS)


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        return getattr(importlib.import_module(f"drift.delivery.{_EXPORTS[name]}"), name)
    raise AttributeError(f"module 'drift.delivery' has no attribute {name!r}")
