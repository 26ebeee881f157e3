"""The on-disk format: writer, reader, keyframes. Nothing else in nbkit touches files."""
from nbkit.store.reader import Recording, load

__all__ = ["Recording", "load"]
