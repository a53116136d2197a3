"""Reporting to the lab's MQTT broker (publisher) and reading every scope back from it (fleet)."""
