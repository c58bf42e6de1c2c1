"""Alarms: the ISA-18.2 lifecycle and journal, the feed from detector events, notifications (MQTT, webhooks, event
stream) and the offline what-if.
"""
