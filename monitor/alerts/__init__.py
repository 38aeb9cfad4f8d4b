"""Alerts: what the daemon raises (``Alert``), the outbox that keeps them, and the channels that deliver them."""

from monitor.alerts.alert import ALERT_KINDS, Alert

__all__ = ["ALERT_KINDS", "Alert"]
