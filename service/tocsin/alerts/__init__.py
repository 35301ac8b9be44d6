"""Alerts: VOEvent 2.0 packets out and in, their archive, and their delivery."""
