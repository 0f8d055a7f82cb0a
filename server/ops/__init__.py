"""Operations support: service heartbeats (worker, MQTT bridge) that /readyz and /metrics read."""
