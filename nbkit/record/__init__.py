"""Hooks and the Recorder; optimizer adapters (which state is which moment)."""
