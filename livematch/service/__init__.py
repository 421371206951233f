"""The live daemon: MQTT transport, state stores, metrics and health (the shell)."""
