"""Use cases: each write is one unit of work. Usable without HTTP (CLI, MQTT bridge, route uploads)."""
