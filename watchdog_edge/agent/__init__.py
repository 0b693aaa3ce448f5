"""The live MQTT agent: the link to the broker, its socket, and the SQLite store."""
