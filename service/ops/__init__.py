"""Operations: the request log, metrics, heartbeats, start-up errors and the settings table."""
