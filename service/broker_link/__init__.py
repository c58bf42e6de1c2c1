"""The broker link: the MQTT client (in a child process by default) that subscribes, acknowledges once logged, and
publishes alarms and dead letters; payload decoding with a reason for every refusal.
"""
