"""The demo scenario: a greenhouse leaf-temperature model with planted faults (data made in code)."""
