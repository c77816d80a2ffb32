"""Service shell of arxwatch: command line, and (to come) MQTT, metrics and state."""
