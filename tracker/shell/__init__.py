"""The shells around the core: the live daemon (MQTT bus, journal, settings, embedded broker)
and the replay of a recording to files.
"""
